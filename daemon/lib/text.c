/* text.c: control characters and UTF-8 (see text.h). */
#include "text.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* Length of the well-formed UTF-8 sequence at s (at most n bytes left), or 0
 * when it is not one (RFC 3629, section 4). */
static size_t utf8_len(const unsigned char *s, size_t n)
{
	unsigned c = s[0];
	size_t k;
	unsigned lo = 0x80, hi = 0xBF;

	if (c < 0x80)
		return 1;
	if (c >= 0xC2 && c <= 0xDF)
		k = 2;
	else if (c >= 0xE0 && c <= 0xEF) {
		k = 3;
		if (c == 0xE0)
			lo = 0xA0; /* overlong */
		if (c == 0xED)
			hi = 0x9F; /* surrogates */
	} else if (c >= 0xF0 && c <= 0xF4) {
		k = 4;
		if (c == 0xF0)
			lo = 0x90; /* overlong */
		if (c == 0xF4)
			hi = 0x8F; /* above U+10FFFF */
	} else
		return 0;
	if (n < k || s[1] < lo || s[1] > hi)
		return 0;
	for (size_t i = 2; i < k; i++)
		if (s[i] < 0x80 || s[i] > 0xBF)
			return 0;
	return k;
}

static bool is_c1(const unsigned char *s, size_t n)
{
	return n >= 2 && s[0] == 0xC2 && s[1] >= 0x80 && s[1] <= 0x9F;
}

size_t text_control_at(const char *s, size_t len, bool allow_newline)
{
	const unsigned char *u = (const unsigned char *)s;

	for (size_t i = 0; i < len; i++) {
		if ((u[i] < 0x20 && u[i] != '\t' && !(allow_newline && u[i] == '\n')) ||
		    u[i] == 0x7F || is_c1(u + i, len - i))
			return i;
	}
	return TEXT_NONE;
}

char *text_escaped(const char *s)
{
	const unsigned char *u = (const unsigned char *)s;
	size_t n = strlen(s), o = 0;
	char *out = malloc(n * 6 + 1); /* \u00NN is 6 bytes for 2 */

	if (!out)
		return NULL;
	for (size_t i = 0; i < n;) {
		size_t k = utf8_len(u + i, n - i);
		if (k == 0 || (k == 1 && (u[i] < 0x20 || u[i] == 0x7F))) {
			o += (size_t)sprintf(out + o, "\\x%02X", u[i]);
			i++;
		} else if (is_c1(u + i, n - i)) {
			o += (size_t)sprintf(out + o, "\\u%04X", (unsigned)u[i + 1]);
			i += 2;
		} else {
			memcpy(out + o, u + i, k);
			o += k;
			i += k;
		}
	}
	out[o] = '\0';
	return out;
}

bool text_utf8_valid(const char *s, size_t len)
{
	const unsigned char *u = (const unsigned char *)s;

	for (size_t i = 0; i < len;) {
		size_t k = utf8_len(u + i, len - i);
		if (!k)
			return false;
		i += k;
	}
	return true;
}

size_t text_utf8_cut(const char *s, size_t max_bytes)
{
	const unsigned char *u = (const unsigned char *)s;
	size_t n = strlen(s), i = 0;

	while (i < n) {
		size_t k = utf8_len(u + i, n - i);
		if (!k)
			k = 1; /* invalid bytes count one each: the caller validated or will */
		if (i + k > max_bytes)
			break;
		i += k;
	}
	return i;
}
