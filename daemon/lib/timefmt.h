/* timefmt.h: RFC 3339 timestamps, the one format every record, log line and
 * API field uses: "2026-12-05T10:38:34.123Z" (UTC, milliseconds, 24 chars).
 */
#ifndef STOPCOCK_TIMEFMT_H
#define STOPCOCK_TIMEFMT_H

#include <stdbool.h>

#define TIME_RFC3339_SIZE 32 /* room for the 24 characters and the NUL */

/* Write unix_s as RFC 3339 UTC with milliseconds (truncated, never rounded up
 * into the next second). Writes "" and returns false for a time that is not
 * finite, negative, or past year 9999. */
bool time_format_rfc3339(double unix_s, char out[TIME_RFC3339_SIZE]);

/* Parse "YYYY-MM-DDTHH:MM:SS[.fff...]Z" or with a "+hh:mm"/"-hh:mm" offset
 * (RFC 3339 section 5.6). Returns false, leaving *unix_s alone, for anything
 * else: a date that does not exist (2026-02-30), trailing text, a missing zone. */
bool time_parse_rfc3339(const char *s, double *unix_s);

#endif
