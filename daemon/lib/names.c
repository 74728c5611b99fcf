/* names.c: see names.h. */
#include "names.h"

bool name_is_id(const char *s, size_t max_len)
{
	size_t n = 0;
	if (!s)
		return false;
	for (; s[n]; n++) {
		char c = s[n];
		if (!((c >= 'a' && c <= 'z') || (c >= '0' && c <= '9') || c == '-'))
			return false;
	}
	return n > 0 && (max_len == 0 || n < max_len);
}
