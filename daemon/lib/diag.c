/* diag.c: see diag.h. */
#include "diag.h"

#include <stdarg.h>
#include <stdbool.h>
#include <stdlib.h>
#include <string.h>

void diag_add(diag_list_t *d, const char *file, int line, int col, const char *fmt, ...)
{
	va_list ap;
	char buf[1024];
	if (!d)
		return;
	if (d->n == d->cap) {
		size_t cap = d->cap ? d->cap * 2 : 8;
		diag_t *v = realloc(d->v, cap * sizeof *v);
		if (!v) {
			return;
		}
		d->v = v;
		d->cap = cap;
	}
	va_start(ap, fmt);
	vsnprintf(buf, sizeof buf, fmt, ap);
	va_end(ap);
	d->v[d->n].file = strdup(file ? file : "");
	d->v[d->n].line = line;
	d->v[d->n].col = col;
	d->v[d->n].msg = strdup(buf);
	d->n++;
}

void diag_print(const diag_list_t *d, FILE *f)
{
	for (size_t i = 0; d && i < d->n; i++)
		fprintf(f, "%s:%d:%d: %s\n", d->v[i].file ? d->v[i].file : "", d->v[i].line,
		        d->v[i].col, d->v[i].msg ? d->v[i].msg : "(out of memory)");
}

char *diag_join(const diag_list_t *d)
{
	size_t len = 1;
	char *out, *p;
	for (size_t i = 0; d && i < d->n; i++)
		len += strlen(d->v[i].file ? d->v[i].file : "") +
		       strlen(d->v[i].msg ? d->v[i].msg : "") + 32;
	out = malloc(len);
	if (!out)
		return NULL;
	p = out;
	*p = '\0';
	for (size_t i = 0; d && i < d->n; i++) {
		int w = snprintf(p, len - (size_t)(p - out), "%s%s:%d:%d: %s", i ? "\n" : "",
		                 d->v[i].file ? d->v[i].file : "", d->v[i].line, d->v[i].col,
		                 d->v[i].msg ? d->v[i].msg : "");
		if (w < 0)
			break;
		p += w;
	}
	return out;
}

static bool diag_before(const diag_t *a, const diag_t *b)
{
	return a->line < b->line || (a->line == b->line && a->col < b->col);
}

void diag_sort(diag_list_t *d)
{
	/* Bottom-up merge sort: stable, and n log n however the errors came in
	 * (an insertion sort was quadratic when a file's thousands of errors
	 * were found out of file order). Without memory the list stays as is. */
	diag_t *tmp;
	if (!d || d->n < 2 || !(tmp = malloc(d->n * sizeof *tmp)))
		return;
	for (size_t w = 1; w < d->n; w *= 2) {
		for (size_t lo = 0; lo < d->n; lo += 2 * w) {
			size_t mid = lo + w < d->n ? lo + w : d->n;
			size_t hi = lo + 2 * w < d->n ? lo + 2 * w : d->n;
			size_t i = lo, j = mid, k = lo;
			while (i < mid && j < hi)
				tmp[k++] = diag_before(&d->v[j], &d->v[i]) ? d->v[j++] : d->v[i++];
			while (i < mid)
				tmp[k++] = d->v[i++];
			while (j < hi)
				tmp[k++] = d->v[j++];
		}
		memcpy(d->v, tmp, d->n * sizeof *tmp);
	}
	free(tmp);
}

void diag_free(diag_list_t *d)
{
	for (size_t i = 0; d && i < d->n; i++) {
		free(d->v[i].file);
		free(d->v[i].msg);
	}
	if (d) {
		free(d->v);
		d->v = NULL;
		d->n = d->cap = 0;
	}
}
