/* sbuf.h: the one growable text buffer.
 *
 * Modelled on SQLite's sqlite3_str: appends never fail visibly, but the first
 * out-of-memory is remembered, and sbuf_finish() then hands back NULL, so a
 * caller answers an error (HTTP 500, exit 1) instead of a silently short text.
 */
#ifndef STOPCOCK_SBUF_H
#define STOPCOCK_SBUF_H

#include <stdarg.h>
#include <stdbool.h>
#include <stddef.h>

typedef struct sbuf {
	char *p;    /* always NUL-terminated once anything was added */
	size_t len; /* bytes, without the NUL */
	size_t cap;
	bool oom; /* an append could not allocate: the text is incomplete */
} sbuf_t;

#define SBUF_INIT                                                                                  \
	{                                                                                          \
		NULL, 0, 0, false                                                                  \
	}

void sbuf_addn(sbuf_t *b, const char *s, size_t n);
void sbuf_add(sbuf_t *b, const char *s);
void sbuf_addc(sbuf_t *b, char c);
void sbuf_addf(sbuf_t *b, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
void sbuf_vaddf(sbuf_t *b, const char *fmt, va_list ap) __attribute__((format(printf, 2, 0)));

/* The text so far ("" when empty); valid until the next append. */
const char *sbuf_str(const sbuf_t *b);

/* Hand over the text (caller frees) and reset b. NULL after an out-of-memory,
 * with the partial text freed; "" (malloc'd) when nothing was added. */
char *sbuf_finish(sbuf_t *b, size_t *len);

void sbuf_free(sbuf_t *b);

#endif
