/* numparse.h: the one set of number parsers for text from people and files.
 *
 * Decimal only: [+-]digits[.digits][(e|E)[+-]digits] or [+-].digits...
 * strtod alone would also take hex ("0x1p3"), "inf", "nan", leading spaces
 * and trailing junk, none of which a lab user means by a number.
 */
#ifndef STOPCOCK_NUMPARSE_H
#define STOPCOCK_NUMPARSE_H

#include <stdbool.h>

/* A finite decimal number, the whole string. */
bool parse_decimal(const char *s, double *out);

/* A whole decimal number (optional sign, digits only) within [lo, hi]. */
bool parse_whole(const char *s, long long lo, long long hi, long long *out);

#endif
