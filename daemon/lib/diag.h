/* diag.h: a list of user-facing errors, each "file:line:col: message".
 *
 * Errors are values: parsers and validators append to a diag_list and go on,
 * so a user sees every problem of a file at once, not only the first.
 * Lines and columns are 1-based, as editors count them; 0 means "unknown"
 * and is printed as 0 rather than left out, so the format never changes.
 */
#ifndef STOPCOCK_DIAG_H
#define STOPCOCK_DIAG_H

#include <stddef.h>
#include <stdio.h>

typedef struct diag {
	char *file; /* as given by the caller (a path or a name like "request") */
	int line;   /* 1-based, 0 when unknown */
	int col;    /* 1-based, 0 when unknown */
	char *msg;
} diag_t;

typedef struct diag_list {
	diag_t *v;
	size_t n;
	size_t cap;
} diag_list_t;

#define DIAG_LIST_INIT                                                                             \
	{                                                                                          \
		NULL, 0, 0                                                                         \
	}

/* Append one error. Never fails visibly: on out-of-memory the message is
 * dropped but the count still rises, so callers still see "invalid". */
void diag_add(diag_list_t *d, const char *file, int line, int col, const char *fmt, ...)
    __attribute__((format(printf, 5, 6)));

/* Print each as "file:line:col: message\n". */
void diag_print(const diag_list_t *d, FILE *f);

/* All errors joined by '\n' in one malloc'd string (caller frees). */
char *diag_join(const diag_list_t *d);

/* Sort by line then column (stable), so output follows the file. */
void diag_sort(diag_list_t *d);

void diag_free(diag_list_t *d);

#endif
