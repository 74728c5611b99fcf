/* digest.h: the SHA-256 fingerprint of a method's exact bytes, so a run
 * record names the text that produced it. The hash itself is nettle's
 * (Debian's nettle-dev), a maintained implementation of FIPS 180-4.
 */
#ifndef STOPCOCK_DIGEST_H
#define STOPCOCK_DIGEST_H

#include <stddef.h>

/* SHA-256 of buf[0..len) as 64 lower-case hex digits plus NUL. */
void digest_sha256_hex(const void *buf, size_t len, char out[65]);

#endif
