/* notify_cmd.h: alarms that reach a person (docs/operations.md, "Alarms").
 *
 * The daemon config's notify_command names a program; this runs it, without
 * a shell, for each event a person must see:
 *
 *   run_failed          a run ended `failed` (the event's code: run)
 *   device_fault        a device fault, an interlock or a stale reading
 *   series_finished     a series ended `finished`
 *   series_stopped      a series ended `failed`, `aborted` or `interrupted`
 *   burette_not_halted  a burette did not confirm a halt (tried again until it does)
 *   calibration_expiring a station's valid calibration expires within 2 h
 *   titer_expiring      a titrant's stored titer expires within 24 h
 *   blank_expiring      a titrant's stored blank expires within 24 h
 *   disk_nearly_full    the database's disk has less than 5 % or 200 MiB free
 *
 * The event goes in environment variables (STOPCOCK_EVENT, STOPCOCK_AT,
 * STOPCOCK_STATION, STOPCOCK_RUN, STOPCOCK_SERIES, STOPCOCK_CODE,
 * STOPCOCK_MESSAGE) and as one JSON object on standard input. Its output is
 * logged, its exit status too; past notify_timeout_s it is killed.
 *
 * One thread of its own reads the audit trail (store_events_after) and the
 * stations' snapshots and runs the program, one event at a time: nothing
 * here runs on a station thread, so an alarm never delays a dose.
 */
#ifndef STOPCOCK_NOTIFY_CMD_H
#define STOPCOCK_NOTIFY_CMD_H

#include "http.h"

typedef struct notify_cmd notify_cmd_t;

/* Start the thread when ctx->cfg has a notify_command (NULL when it has
 * none, or the thread could not start: then a message is logged). Events
 * already in the audit trail are not sent again. */
notify_cmd_t *notify_cmd_start(http_ctx_t *ctx);
/* Send what is still to send (each with its timeout), stop, free. */
void notify_cmd_stop(notify_cmd_t *nc);

/* The event word for an audit-trail event (kind, code), or NULL when it is
 * none a person is told of. Pure; for tests. */
const char *notify_cmd_event_of(const char *kind, const char *code);

/* Thresholds of the last two (docs/operations.md, "Alarms"). */
#define NOTIFY_DISK_LOW_FRACTION 0.05              /* of the disk's size */
#define NOTIFY_DISK_LOW_BYTES    (200.0 * 1048576) /* 200 MiB, bytes */
#define NOTIFY_EXPIRE_WARN_S     (2 * 3600.0)      /* before a calibration expires, s */
/* before a titer or blank expires, s: a day, to standardize or run the
 * blank again before the next day's assays */
#define NOTIFY_TITER_WARN_S (24 * 3600.0)
/* True when so little space is left that a person should be told. Pure. */
bool notify_cmd_disk_low(double avail_bytes, double total_bytes);
/* True when a calibration valid until expires_at (Unix s; 0: none) expires
 * within NOTIFY_EXPIRE_WARN_S of now. Pure. */
bool notify_cmd_expiring(double expires_at_unix_s, double now_unix_s);
/* The same for a titer or a blank: within NOTIFY_TITER_WARN_S. Pure. */
bool notify_cmd_titer_expiring(double expires_at_unix_s, double now_unix_s);

#endif
