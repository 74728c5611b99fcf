/* sha256.h: SHA-256 (FIPS 180-4), our own small implementation.
 *
 * Used to fingerprint the exact bytes of each method revision, so a run record
 * names the text that produced it. Streaming (init/update/final) for large
 * inputs, and one-shot helpers for the common case.
 */
#ifndef STOPCOCK_SHA256_H
#define STOPCOCK_SHA256_H

#include <stddef.h>
#include <stdint.h>

typedef struct sha256_ctx {
	uint32_t h[8];
	uint64_t total_bytes;
	unsigned char block[64];
	size_t fill; /* bytes in block */
} sha256_ctx_t;

void sha256_init(sha256_ctx_t *c);
void sha256_update(sha256_ctx_t *c, const void *buf, size_t len);
void sha256_final(sha256_ctx_t *c, unsigned char out[32]);

/* Digest of buf[0..len) as 64 lower-case hex digits plus NUL. */
void sha256_hex(const void *buf, size_t len, char out[65]);

#endif
