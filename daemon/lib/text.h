/* text.h: what text from people and files may hold, and how it is shown.
 *
 * Text that reaches a record, a log or a terminal may not hold control
 * characters: an escape sequence in a sample id would repaint an operator's
 * terminal, a newline would forge a line of output. So text fields from
 * clients and files refuse them (text_control_at), and every CLI output
 * escapes them anyway (text_escaped). Control characters are C0 (below
 * U+0020) but tab, DEL (U+007F) and C1 (U+0080 to U+009F); a newline is
 * allowed only where a caller says so (multi-line YAML values).
 */
#ifndef STOPCOCK_TEXT_H
#define STOPCOCK_TEXT_H

#include <stdbool.h>
#include <stddef.h>

#define TEXT_NONE ((size_t)-1)

/* Byte offset of the first control character in s[0..len), or TEXT_NONE. */
size_t text_control_at(const char *s, size_t len, bool allow_newline);

/* A malloc'd copy of s with each control character written as \xNN (C0,
 * DEL) or \u00NN (C1), and each byte of invalid UTF-8 as \xNN; NULL on
 * out-of-memory. */
char *text_escaped(const char *s);

/* Whether s[0..len) is well-formed UTF-8 (no overlong forms, no surrogates,
 * nothing above U+10FFFF). */
bool text_utf8_valid(const char *s, size_t len);

/* The longest prefix of the UTF-8 string s of at most max_bytes bytes that
 * ends on a character boundary. */
size_t text_utf8_cut(const char *s, size_t max_bytes);

#endif
