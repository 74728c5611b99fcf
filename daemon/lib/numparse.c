/* numparse.c: see numparse.h. */
#include "numparse.h"

#include <errno.h>
#include <math.h>
#include <stdlib.h>

static const char *skip_digits(const char *p, bool *any)
{
	while (*p >= '0' && *p <= '9') {
		p++;
		*any = true;
	}
	return p;
}

bool parse_decimal(const char *s, double *out)
{
	if (!s)
		return false;
	const char *p = s;
	bool mant = false;
	if (*p == '+' || *p == '-')
		p++;
	p = skip_digits(p, &mant);
	if (*p == '.')
		p = skip_digits(p + 1, &mant);
	if (!mant)
		return false;
	if (*p == 'e' || *p == 'E') {
		bool exp = false;
		p++;
		if (*p == '+' || *p == '-')
			p++;
		p = skip_digits(p, &exp);
		if (!exp)
			return false;
	}
	if (*p != '\0')
		return false;
	char *end;
	errno = 0;
	double v = strtod(s, &end);
	if (*end != '\0' || !isfinite(v))
		return false;
	*out = v;
	return true;
}

bool parse_whole(const char *s, long long lo, long long hi, long long *out)
{
	if (!s)
		return false;
	const char *p = s;
	bool any = false;
	if (*p == '+' || *p == '-')
		p++;
	p = skip_digits(p, &any);
	if (!any || *p != '\0')
		return false;
	char *end;
	errno = 0;
	long long v = strtoll(s, &end, 10);
	if (errno == ERANGE || *end != '\0' || v < lo || v > hi)
		return false;
	*out = v;
	return true;
}
