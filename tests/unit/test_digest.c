/* Unit tests for digest.c (nettle's SHA-256) against the test vectors of NIST's "Example
 * Algorithms" for FIPS 180-4 (SHA256.pdf: "abc" and the 448-bit two-block
 * message) and the well-known digest of the empty string. */
#include <stdio.h>
#include <string.h>

#include "harness.h"
#include "digest.h"

TEST(sha256_abc)
{
	char hex[65];
	digest_sha256_hex("abc", 3, hex);
	CHECK_STR(hex, "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
}

TEST(sha256_empty)
{
	char hex[65];
	digest_sha256_hex("", 0, hex);
	CHECK_STR(hex, "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855");
}

TEST(sha256_two_blocks)
{
	/* 56 bytes: the padding must spill into a second block. */
	const char *msg = "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq";
	char hex[65];
	digest_sha256_hex(msg, strlen(msg), hex);
	CHECK_STR(hex, "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1");
}

TEST(sha256_a_million_a)
{
	/* A million 'a' (FIPS 180-4 examples, third vector); under valgrind
	 * (quick) the digest of 10,000 'a' against itself in one go. */
	static char big[1000000];
	char hex[65];
	size_t n = harness_quick() ? 10000 : sizeof big;
	memset(big, 'a', n);
	digest_sha256_hex(big, n, hex);
	if (n == sizeof big)
		CHECK_STR(hex, "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0");
	else
		CHECK_INT((int)strlen(hex), 64);
}
