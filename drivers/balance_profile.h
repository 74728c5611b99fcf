/* balance_profile.h: the data profile of a line-based ASCII balance, read by
 * the shared command-profile mechanism (cmd_profile.h); keys in
 * docs/drivers.md, "Balance profiles". balance_serial.c drives any balance a
 * profile describes.
 *
 * Commands: `weigh` asks for a stable weight (no placeholders). Replies, in
 * the order tried: `error` ({code}, {text}), `unstable` (the pan has not
 * settled yet), `stable` whose {text} is the value and its unit
 * ("10.0120 g").
 */
#ifndef STOPCOCK_BALANCE_PROFILE_H
#define STOPCOCK_BALANCE_PROFILE_H

#include "cmd_profile.h"

typedef struct balance_profile {
	char name[64];
	char command_end[CMDP_END];
	char reply_end[CMDP_END];
	char weigh[CMDP_STR];
	char error[CMDP_STR], unstable[CMDP_STR], stable[CMDP_STR];
} balance_profile_t;

typedef enum {
	BALANCE_REPLY_UNKNOWN = -1,
	BALANCE_REPLY_ERROR = 0, /* the order of the profile's replies spec */
	BALANCE_REPLY_UNSTABLE,
	BALANCE_REPLY_STABLE,
} balance_reply_kind_t;

typedef struct balance_reply {
	balance_reply_kind_t kind;
	long code;
	double value; /* stable: the weight, in `unit` */
	char unit[8]; /* stable: "g", "mg" or "kg" */
	char text[CMDP_STR];
} balance_reply_t;

int balance_profile_load(const char *path, balance_profile_t *p, diag_list_t *d);
int balance_profile_parse(const yt_doc_t *doc, balance_profile_t *p, diag_list_t *d);
/* A stable reply whose text is not "NUMBER UNIT" with a known unit is
 * BALANCE_REPLY_UNKNOWN: a weight the driver cannot read is never a weight. */
balance_reply_kind_t balance_parse_reply(const balance_profile_t *p, const char *line,
                                         balance_reply_t *out);

#endif
