/* titer_book.c: the daemon's series of replicate titers (see titer_book.h). */
#include "titer_book.h"

#include <pthread.h>
#include <stdlib.h>
#include <string.h>

struct titer_book {
	pthread_mutex_t lock; /* stations add from their own threads */
	titer_series_t *v;
	int n, cap;
};

titer_book_t *titer_book_new(void)
{
	titer_book_t *b = calloc(1, sizeof *b);

	if (b)
		pthread_mutex_init(&b->lock, NULL);
	return b;
}

void titer_book_free(titer_book_t *b)
{
	if (!b)
		return;
	pthread_mutex_destroy(&b->lock);
	free(b->v);
	free(b);
}

static titer_series_t *series_of(titer_book_t *b, const char *titrant)
{
	for (int i = 0; i < b->n; i++)
		if (!strcmp(b->v[i].titrant, titrant))
			return &b->v[i];
	if (b->n == b->cap) {
		int cap = b->cap ? 2 * b->cap : 8;
		titer_series_t *v = realloc(b->v, (size_t)cap * sizeof *v);
		if (!v)
			return NULL;
		b->v = v;
		b->cap = cap;
	}
	memset(&b->v[b->n], 0, sizeof b->v[b->n]);
	return &b->v[b->n++];
}

bool titer_book_add(titer_book_t *b, const standardization_config_t *cfg, const char *titrant,
                    double titer, int *replicate, standardization_result_t *out)
{
	bool complete = false;

	pthread_mutex_lock(&b->lock);
	titer_series_t *s = series_of(b, titrant);
	if (!s) {
		*replicate = -1;
	} else {
		*replicate = s->n + 1;
		complete = titer_series_add(s, cfg, titrant, titer, out);
	}
	pthread_mutex_unlock(&b->lock);
	return complete;
}

int titer_book_titrants(titer_book_t *b)
{
	pthread_mutex_lock(&b->lock);
	int n = b->n;
	pthread_mutex_unlock(&b->lock);
	return n;
}
