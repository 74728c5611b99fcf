/* names.h: the rules for names people give things.
 *
 * An id (method, station, scenario name in a URL or a file name) is
 * [a-z0-9-]+: safe in a path, a URL and a shell without quoting.
 */
#ifndef STOPCOCK_NAMES_H
#define STOPCOCK_NAMES_H

#include <stdbool.h>
#include <stddef.h>

/* 1 to max_len - 1 characters of [a-z0-9-] (max_len counts the NUL, as the
 * char arrays holding ids do; 0 means no limit). */
bool name_is_id(const char *s, size_t max_len);

#endif
