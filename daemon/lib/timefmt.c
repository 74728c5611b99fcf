/* timefmt.c: see timefmt.h. */
#include "timefmt.h"

#include <math.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

/* 9999-12-31T23:59:59Z: four-digit years only, as RFC 3339 requires. */
#define LAST_UNIX_S 253402300799.0

bool time_format_rfc3339(double unix_s, char out[TIME_RFC3339_SIZE])
{
	out[0] = '\0';
	if (!isfinite(unix_s) || unix_s < 0 || unix_s > LAST_UNIX_S)
		return false;
	time_t sec = (time_t)floor(unix_s);
	/* The small epsilon keeps 0.123 (stored as 0.12299999...) at 123 ms. */
	int ms = (int)floor((unix_s - (double)sec) * 1000.0 + 1e-6);
	if (ms > 999)
		ms = 999;
	if (ms < 0)
		ms = 0;
	struct tm tm;
	if (!gmtime_r(&sec, &tm))
		return false;
	char date[24];
	if (strftime(date, sizeof date, "%Y-%m-%dT%H:%M:%S", &tm) != 19)
		return false;
	snprintf(out, TIME_RFC3339_SIZE, "%.19s.%03dZ", date, ms);
	return true;
}

static bool digits(const char *s, int n, int *out)
{
	int v = 0;
	for (int i = 0; i < n; i++) {
		if (s[i] < '0' || s[i] > '9')
			return false;
		v = v * 10 + (s[i] - '0');
	}
	*out = v;
	return true;
}

bool time_parse_rfc3339(const char *s, double *unix_s)
{
	int y, mo, d, h, mi, sec;
	if (!s || strlen(s) < 20)
		return false;
	if (!digits(s, 4, &y) || s[4] != '-' || !digits(s + 5, 2, &mo) || s[7] != '-' ||
	    !digits(s + 8, 2, &d) || (s[10] != 'T' && s[10] != 't') || !digits(s + 11, 2, &h) ||
	    s[13] != ':' || !digits(s + 14, 2, &mi) || s[16] != ':' || !digits(s + 17, 2, &sec))
		return false;
	if (mo < 1 || mo > 12 || d < 1 || d > 31 || h > 23 || mi > 59 || sec > 59)
		return false;
	const char *p = s + 19;
	double frac = 0;
	if (*p == '.') {
		double scale = 0.1;
		p++;
		if (*p < '0' || *p > '9')
			return false;
		for (; *p >= '0' && *p <= '9'; p++, scale /= 10)
			frac += (*p - '0') * scale;
	}
	int offset_s = 0;
	if (*p == 'Z' || *p == 'z') {
		p++;
	} else if (*p == '+' || *p == '-') {
		int oh, om;
		if (!digits(p + 1, 2, &oh) || p[3] != ':' || !digits(p + 4, 2, &om) || oh > 23 ||
		    om > 59)
			return false;
		offset_s = (oh * 3600 + om * 60) * (*p == '-' ? -1 : 1);
		p += 6;
	} else {
		return false;
	}
	if (*p != '\0')
		return false;
	struct tm tm = {0};
	tm.tm_year = y - 1900;
	tm.tm_mon = mo - 1;
	tm.tm_mday = d;
	tm.tm_hour = h;
	tm.tm_min = mi;
	tm.tm_sec = sec;
	time_t t = timegm(&tm);
	/* timegm normalises 2026-02-30 to March 2: a date that moved did not exist. */
	if (t == (time_t)-1 || tm.tm_mday != d || tm.tm_mon != mo - 1)
		return false;
	*unix_s = (double)t + frac - offset_s;
	return true;
}
