/* Unit tests for sha256.c against the test vectors of NIST's "Example
 * Algorithms" for FIPS 180-4 (SHA256.pdf: "abc" and the 448-bit two-block
 * message) and the well-known digest of the empty string. */
#include <stdio.h>
#include <string.h>

#include "harness.h"
#include "sha256.h"

TEST(sha256_abc)
{
	char hex[65];
	sha256_hex("abc", 3, hex);
	CHECK_STR(hex, "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
}

TEST(sha256_empty)
{
	char hex[65];
	sha256_hex("", 0, hex);
	CHECK_STR(hex, "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855");
}

TEST(sha256_two_blocks)
{
	/* 56 bytes: the padding must spill into a second block. */
	const char *msg = "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq";
	char hex[65];
	sha256_hex(msg, strlen(msg), hex);
	CHECK_STR(hex, "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1");
}

TEST(sha256_streaming_matches_one_shot)
{
	/* A million 'a' (FIPS 180-4 examples, third vector) fed in odd-sized
	 * pieces; under valgrind (quick) only the chunking equality is checked. */
	static char buf[1000];
	sha256_ctx_t c;
	unsigned char dig[32];
	char hex[65], one[65];
	int rounds = harness_quick() ? 10 : 1000;
	memset(buf, 'a', sizeof buf);
	sha256_init(&c);
	for (int i = 0; i < rounds; i++) {
		sha256_update(&c, buf, 7);
		sha256_update(&c, buf, 993);
	}
	sha256_final(&c, dig);
	for (int i = 0; i < 32; i++)
		snprintf(hex + 2 * i, 3, "%02x", dig[i]);
	if (rounds == 1000) {
		CHECK_STR(hex, "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0");
	} else {
		static char big[10000];
		memset(big, 'a', sizeof big);
		sha256_hex(big, sizeof big, one);
		CHECK_STR(hex, one);
	}
}
