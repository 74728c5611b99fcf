/* log.c: see log.h. */
#include "log.h"
#include "clock.h"
#include "timefmt.h"

#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

/* Process-wide by nature (stderr is one stream); set once before threads start. */
static struct {
	const char *program;
	bool verbose;
	bool journal;
} log_cfg = {"stopcock", false, false};

static pthread_mutex_t log_lock = PTHREAD_MUTEX_INITIALIZER;

/* JOURNAL_STREAM is "device:inode" of the journal socket systemd gave us as
 * stderr (systemd.exec(5)); only then are "<N>" prefixes understood. */
static bool stderr_is_journal(void)
{
	const char *js = getenv("JOURNAL_STREAM");
	unsigned long long dev, ino;
	struct stat st;
	if (!js || sscanf(js, "%llu:%llu", &dev, &ino) != 2)
		return false;
	if (fstat(STDERR_FILENO, &st) != 0)
		return false;
	return (unsigned long long)st.st_dev == dev && (unsigned long long)st.st_ino == ino;
}

void log_init(const char *program, bool verbose)
{
	log_cfg.program = program;
	log_cfg.verbose = verbose;
	log_cfg.journal = stderr_is_journal();
}

bool log_verbose(void)
{
	return log_cfg.verbose;
}

void log_msg(int level, const char *fmt, ...)
{
	static const char *const words[8] = {"emerg",   "alert",  "crit", "error",
	                                     "warning", "notice", "info", "debug"};
	char line[2048];
	va_list ap;
	if (level >= LOG_LVL_DEBUG && !log_cfg.verbose)
		return;
	if (level < 0 || level > 7)
		level = LOG_LVL_INFO;
	va_start(ap, fmt);
	vsnprintf(line, sizeof line, fmt, ap);
	va_end(ap);
	/* One event, one line: fold embedded newlines. */
	for (char *p = line; *p; p++)
		if (*p == '\n' || *p == '\r')
			*p = ' ';
	pthread_mutex_lock(&log_lock);
	if (log_cfg.journal) {
		fprintf(stderr, "<%d>%s\n", level, line);
	} else {
		char when[TIME_RFC3339_SIZE];
		time_format_rfc3339(clock_wall_s(), when);
		fprintf(stderr, "%s %s %s: %s\n", when, log_cfg.program, words[level], line);
	}
	fflush(stderr);
	pthread_mutex_unlock(&log_lock);
}
