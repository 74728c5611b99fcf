/* digest.c: SHA-256 through nettle (see digest.h). */
#include "digest.h"

#include <nettle/sha2.h>
#include <stdint.h>
#include <stdio.h>

void digest_sha256_hex(const void *buf, size_t len, char out[65])
{
	struct sha256_ctx c;
	uint8_t dig[SHA256_DIGEST_SIZE];

	sha256_init(&c);
	sha256_update(&c, len, buf);
	sha256_digest(&c, sizeof dig, dig);
	for (int i = 0; i < SHA256_DIGEST_SIZE; i++)
		snprintf(out + 2 * i, 3, "%02x", dig[i]);
}
