/* log.h: one line per event, fit for journald.
 *
 * When stderr is the journal (JOURNAL_STREAM names it), each line starts with
 * the syslog priority prefix "<N>" so journald files it at that level;
 * otherwise lines carry a UTC timestamp and the level word. Callers put the
 * context first: "station sim1 run 12: ...". LOG_DEBUG lines appear only with
 * --verbose (device traffic).
 */
#ifndef STOPCOCK_LOG_H
#define STOPCOCK_LOG_H

#include <stdbool.h>

enum {
	LOG_LVL_ERR = 3,
	LOG_LVL_WARNING = 4,
	LOG_LVL_NOTICE = 5,
	LOG_LVL_INFO = 6,
	LOG_LVL_DEBUG = 7
};

void log_init(const char *program, bool verbose);
bool log_verbose(void);
void log_msg(int level, const char *fmt, ...) __attribute__((format(printf, 2, 3)));

#define log_err(...)    log_msg(LOG_LVL_ERR, __VA_ARGS__)
#define log_warn(...)   log_msg(LOG_LVL_WARNING, __VA_ARGS__)
#define log_notice(...) log_msg(LOG_LVL_NOTICE, __VA_ARGS__)
#define log_info(...)   log_msg(LOG_LVL_INFO, __VA_ARGS__)
#define log_debug(...)  log_msg(LOG_LVL_DEBUG, __VA_ARGS__)

#endif
