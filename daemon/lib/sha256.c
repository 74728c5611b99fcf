/* sha256.c: see sha256.h. Follows FIPS 180-4 sections 4.1.2, 4.2.2, 5.1.1,
 * 5.3.3 and 6.2 directly; speed is not a goal (method files are small). */
#include "sha256.h"

#include <string.h>

/* FIPS 180-4 section 4.2.2: first 32 bits of the fractional parts of the cube
 * roots of the first 64 primes. */
static const uint32_t K[64] = {
    0x428a2f98, 0x71374491, 0xb5c0fbcf, 0xe9b5dba5, 0x3956c25b, 0x59f111f1, 0x923f82a4, 0xab1c5ed5,
    0xd807aa98, 0x12835b01, 0x243185be, 0x550c7dc3, 0x72be5d74, 0x80deb1fe, 0x9bdc06a7, 0xc19bf174,
    0xe49b69c1, 0xefbe4786, 0x0fc19dc6, 0x240ca1cc, 0x2de92c6f, 0x4a7484aa, 0x5cb0a9dc, 0x76f988da,
    0x983e5152, 0xa831c66d, 0xb00327c8, 0xbf597fc7, 0xc6e00bf3, 0xd5a79147, 0x06ca6351, 0x14292967,
    0x27b70a85, 0x2e1b2138, 0x4d2c6dfc, 0x53380d13, 0x650a7354, 0x766a0abb, 0x81c2c92e, 0x92722c85,
    0xa2bfe8a1, 0xa81a664b, 0xc24b8b70, 0xc76c51a3, 0xd192e819, 0xd6990624, 0xf40e3585, 0x106aa070,
    0x19a4c116, 0x1e376c08, 0x2748774c, 0x34b0bcb5, 0x391c0cb3, 0x4ed8aa4a, 0x5b9cca4f, 0x682e6ff3,
    0x748f82ee, 0x78a5636f, 0x84c87814, 0x8cc70208, 0x90befffa, 0xa4506ceb, 0xbef9a3f7, 0xc67178f2,
};

static uint32_t rotr(uint32_t x, unsigned n)
{
	return (x >> n) | (x << (32 - n));
}

static void sha256_block(sha256_ctx_t *c, const unsigned char *p)
{
	uint32_t w[64], a, b, cc, d, e, f, g, h;
	for (int t = 0; t < 16; t++)
		w[t] = (uint32_t)p[4 * t] << 24 | (uint32_t)p[4 * t + 1] << 16 |
		       (uint32_t)p[4 * t + 2] << 8 | (uint32_t)p[4 * t + 3];
	for (int t = 16; t < 64; t++) {
		uint32_t s0 = rotr(w[t - 15], 7) ^ rotr(w[t - 15], 18) ^ (w[t - 15] >> 3);
		uint32_t s1 = rotr(w[t - 2], 17) ^ rotr(w[t - 2], 19) ^ (w[t - 2] >> 10);
		w[t] = w[t - 16] + s0 + w[t - 7] + s1;
	}
	a = c->h[0], b = c->h[1], cc = c->h[2], d = c->h[3];
	e = c->h[4], f = c->h[5], g = c->h[6], h = c->h[7];
	for (int t = 0; t < 64; t++) {
		uint32_t s1 = rotr(e, 6) ^ rotr(e, 11) ^ rotr(e, 25);
		uint32_t ch = (e & f) ^ (~e & g);
		uint32_t t1 = h + s1 + ch + K[t] + w[t];
		uint32_t s0 = rotr(a, 2) ^ rotr(a, 13) ^ rotr(a, 22);
		uint32_t maj = (a & b) ^ (a & cc) ^ (b & cc);
		uint32_t t2 = s0 + maj;
		h = g, g = f, f = e, e = d + t1;
		d = cc, cc = b, b = a, a = t1 + t2;
	}
	c->h[0] += a, c->h[1] += b, c->h[2] += cc, c->h[3] += d;
	c->h[4] += e, c->h[5] += f, c->h[6] += g, c->h[7] += h;
}

void sha256_init(sha256_ctx_t *c)
{
	/* FIPS 180-4 section 5.3.3: initial hash value. */
	static const uint32_t h0[8] = {0x6a09e667, 0xbb67ae85, 0x3c6ef372, 0xa54ff53a,
	                               0x510e527f, 0x9b05688c, 0x1f83d9ab, 0x5be0cd19};
	memcpy(c->h, h0, sizeof h0);
	c->total_bytes = 0;
	c->fill = 0;
}

void sha256_update(sha256_ctx_t *c, const void *buf, size_t len)
{
	const unsigned char *p = buf;
	c->total_bytes += len;
	while (len > 0) {
		size_t take = 64 - c->fill;
		if (take > len)
			take = len;
		memcpy(c->block + c->fill, p, take);
		c->fill += take;
		p += take;
		len -= take;
		if (c->fill == 64) {
			sha256_block(c, c->block);
			c->fill = 0;
		}
	}
}

void sha256_final(sha256_ctx_t *c, unsigned char out[32])
{
	/* FIPS 180-4 section 5.1.1: a 1 bit, zeros, then the length in bits as a
	 * 64-bit big-endian number, to a multiple of 512 bits. */
	uint64_t bits = c->total_bytes * 8;
	unsigned char pad = 0x80, zero = 0, len_be[8];
	uint64_t total = c->total_bytes;
	sha256_update(c, &pad, 1);
	while (c->fill != 56)
		sha256_update(c, &zero, 1);
	for (int i = 0; i < 8; i++)
		len_be[i] = (unsigned char)(bits >> (56 - 8 * i));
	sha256_update(c, len_be, 8);
	c->total_bytes = total;
	for (int i = 0; i < 8; i++) {
		out[4 * i] = (unsigned char)(c->h[i] >> 24);
		out[4 * i + 1] = (unsigned char)(c->h[i] >> 16);
		out[4 * i + 2] = (unsigned char)(c->h[i] >> 8);
		out[4 * i + 3] = (unsigned char)c->h[i];
	}
}

void sha256_hex(const void *buf, size_t len, char out[65])
{
	static const char hex[] = "0123456789abcdef";
	unsigned char dig[32];
	sha256_ctx_t c;
	sha256_init(&c);
	sha256_update(&c, buf, len);
	sha256_final(&c, dig);
	for (int i = 0; i < 32; i++) {
		out[2 * i] = hex[dig[i] >> 4];
		out[2 * i + 1] = hex[dig[i] & 15];
	}
	out[64] = '\0';
}
