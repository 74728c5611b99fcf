/* sbuf.c: see sbuf.h. */
#include "sbuf.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static bool reserve(sbuf_t *b, size_t more)
{
	if (b->oom)
		return false;
	if (more > (size_t)-1 / 2 - b->len) {
		b->oom = true;
		return false;
	}
	size_t need = b->len + more + 1;
	if (need <= b->cap)
		return true;
	size_t cap = b->cap ? b->cap : 256;
	while (cap < need)
		cap *= 2;
	char *p = realloc(b->p, cap);
	if (!p) {
		b->oom = true;
		return false;
	}
	b->p = p;
	b->cap = cap;
	return true;
}

void sbuf_addn(sbuf_t *b, const char *s, size_t n)
{
	if (!reserve(b, n))
		return;
	if (n)
		memcpy(b->p + b->len, s, n);
	b->len += n;
	b->p[b->len] = '\0';
}

void sbuf_add(sbuf_t *b, const char *s)
{
	sbuf_addn(b, s, strlen(s));
}

void sbuf_addc(sbuf_t *b, char c)
{
	sbuf_addn(b, &c, 1);
}

void sbuf_vaddf(sbuf_t *b, const char *fmt, va_list ap)
{
	va_list ap2;
	va_copy(ap2, ap);
	int n = vsnprintf(NULL, 0, fmt, ap2);
	va_end(ap2);
	if (n < 0) {
		b->oom = true;
		return;
	}
	if (!reserve(b, (size_t)n))
		return;
	vsnprintf(b->p + b->len, (size_t)n + 1, fmt, ap);
	b->len += (size_t)n;
}

void sbuf_addf(sbuf_t *b, const char *fmt, ...)
{
	va_list ap;
	va_start(ap, fmt);
	sbuf_vaddf(b, fmt, ap);
	va_end(ap);
}

const char *sbuf_str(const sbuf_t *b)
{
	return b->p ? b->p : "";
}

char *sbuf_finish(sbuf_t *b, size_t *len)
{
	char *out = NULL;
	if (!b->oom) {
		out = b->p ? b->p : calloc(1, 1);
		if (out && len)
			*len = b->len;
		if (out == b->p)
			b->p = NULL;
	}
	sbuf_free(b);
	return out;
}

void sbuf_free(sbuf_t *b)
{
	free(b->p);
	b->p = NULL;
	b->len = b->cap = 0;
	b->oom = false;
}
