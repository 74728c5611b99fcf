/* pump_profile.h: the data profile of a line-based ASCII syringe pump.
 *
 * A profile (config/pumps/NAME.yaml, keys in docs/drivers.md) says how to talk
 * to one kind of pump: command templates with placeholders, terminators and
 * reply patterns, read by the shared command-profile mechanism
 * (cmd_profile.h). pump_serial.c drives any pump a profile describes.
 *
 * Templates: literal text with {steps}, {volume_ul}, {volume_ml}, {speed}
 * (steps per second) and {position} (target plunger position in steps).
 * Reply patterns: literal text; {position} and {code} match an integer,
 * {text} the rest of the line (last only); a space matches one or more
 * blanks. Position counts steps of titrant in the syringe (0 = empty).
 */
#ifndef STOPCOCK_PUMP_PROFILE_H
#define STOPCOCK_PUMP_PROFILE_H

#include <stdbool.h>

#include "cmd_profile.h"
#include "diag.h"
#include "yamltree.h"

#define PUMP_STR CMDP_STR

typedef struct pump_profile {
	char name[64];
	char command_end[CMDP_END]; /* sent after each command */
	char reply_end[CMDP_END];   /* ends each reply line */
	long steps;                 /* steps per full stroke */
	double capacity_ml;         /* syringe volume */
	double dose_rate_ml_min;
	double fill_rate_ml_min;
	long max_speed; /* highest {speed} the pump takes, steps/s */
	/* commands ("" when the pump has no such command) */
	char init[PUMP_STR], dose[PUMP_STR], fill[PUMP_STR], valve_in[PUMP_STR],
	    valve_out[PUMP_STR], halt[PUMP_STR], status[PUMP_STR];
	/* reply patterns */
	char ok[PUMP_STR], busy[PUMP_STR], error[PUMP_STR], moving[PUMP_STR], idle[PUMP_STR];
} pump_profile_t;

typedef enum {
	PUMP_REPLY_UNKNOWN = 0, /* matched nothing: garbage, discard */
	PUMP_REPLY_OK,
	PUMP_REPLY_BUSY,
	PUMP_REPLY_ERROR,
	PUMP_REPLY_MOVING,
	PUMP_REPLY_IDLE,
} pump_reply_kind_t;

typedef struct pump_reply {
	pump_reply_kind_t kind;
	long position;       /* MOVING / IDLE */
	long code;           /* ERROR, when the pattern has {code}; else 0 */
	char text[PUMP_STR]; /* ERROR, when the pattern has {text} */
} pump_reply_t;

typedef struct pump_args {
	long steps;
	double volume_ml;
	long speed;
	long position;
} pump_args_t;

/* Load a profile file; errors as file:line:col in d. Returns 0 or -1. */
int pump_profile_load(const char *path, pump_profile_t *p, diag_list_t *d);
int pump_profile_parse(const yt_doc_t *doc, pump_profile_t *p, diag_list_t *d);

/* Expand a template. Returns the length, or -1 for an unknown placeholder or
 * an output that does not fit. */
int pump_expand(const char *tmpl, const pump_args_t *a, char *out, size_t cap);

/* Classify one reply line (terminator removed). Pure. Bytes outside printable
 * ASCII are ignored, and a pattern may match after leading garbage; the
 * earliest match wins. */
pump_reply_kind_t pump_parse_reply(const pump_profile_t *p, const char *line, pump_reply_t *out);

/* Match one pattern against all of s (exported for tests). */
bool pump_match(const char *pat, const char *s, pump_reply_t *out);

#endif
