/* changer_profile.h: the data profile of a line-based ASCII sample changer,
 * read by the shared command-profile mechanism (cmd_profile.h); keys in
 * docs/drivers.md, "Changer profiles". changer_serial.c drives any changer
 * a profile describes.
 *
 * Templates: {position} (1 .. positions), {seconds} (one decimal) and {ms}
 * (whole milliseconds) for the pumps. Replies: {position}, {lift} (0 = head
 * up, 1 = head down, anything else = between) and {code} match integers,
 * {text} the rest of the line.
 */
#ifndef STOPCOCK_CHANGER_PROFILE_H
#define STOPCOCK_CHANGER_PROFILE_H

#include "cmd_profile.h"

typedef struct changer_profile {
	char name[64];
	char command_end[CMDP_END];
	char reply_end[CMDP_END];
	long positions; /* numbered 1 .. positions */
	char init[CMDP_STR], move[CMDP_STR], lift_up[CMDP_STR], lift_down[CMDP_STR],
	    rinse[CMDP_STR], waste[CMDP_STR], halt[CMDP_STR], status[CMDP_STR];
	char ok[CMDP_STR], busy[CMDP_STR], error[CMDP_STR], moving[CMDP_STR], idle[CMDP_STR];
} changer_profile_t;

typedef enum {
	CHANGER_REPLY_UNKNOWN = -1,
	CHANGER_REPLY_ERROR = 0, /* the order of the profile's replies spec */
	CHANGER_REPLY_BUSY,
	CHANGER_REPLY_MOVING,
	CHANGER_REPLY_IDLE,
	CHANGER_REPLY_OK,
} changer_reply_kind_t;

typedef struct changer_reply {
	changer_reply_kind_t kind;
	long position, lift, code;
	char text[CMDP_STR];
} changer_reply_t;

int changer_profile_load(const char *path, changer_profile_t *p, diag_list_t *d);
int changer_profile_parse(const yt_doc_t *doc, changer_profile_t *p, diag_list_t *d);
changer_reply_kind_t changer_parse_reply(const changer_profile_t *p, const char *line,
                                         changer_reply_t *out);

#endif
