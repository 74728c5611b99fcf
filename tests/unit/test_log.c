/* test_log.c: log.c writes one line per event, with journald priority
 * prefixes only when stderr is the stream JOURNAL_STREAM names
 * (systemd.exec(5), "$JOURNAL_STREAM"). */
#include "harness.h"
#include "log.h"

#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

struct captured {
	int saved_fd;
	char path[64];
};

/* Point stderr (fd 2) at a fresh file; with journal, name it in JOURNAL_STREAM. */
static bool capture_start(struct captured *c, bool journal)
{
	struct stat st;
	char env[64];
	snprintf(c->path, sizeof c->path, "/tmp/stopcock-log-%d.txt", (int)getpid());
	int fd = open(c->path, O_RDWR | O_CREAT | O_TRUNC | O_CLOEXEC, 0600);
	if (fd < 0)
		return false;
	fflush(stderr);
	c->saved_fd = dup(STDERR_FILENO);
	if (c->saved_fd < 0 || dup2(fd, STDERR_FILENO) < 0 || fstat(fd, &st) != 0) {
		close(fd);
		return false;
	}
	close(fd);
	if (journal) {
		snprintf(env, sizeof env, "%llu:%llu", (unsigned long long)st.st_dev,
		         (unsigned long long)st.st_ino);
		setenv("JOURNAL_STREAM", env, 1);
	} else {
		unsetenv("JOURNAL_STREAM");
	}
	return true;
}

/* Restore stderr and return what was written (static buffer). */
static const char *capture_end(struct captured *c)
{
	static char text[4096];
	fflush(stderr);
	dup2(c->saved_fd, STDERR_FILENO);
	close(c->saved_fd);
	unsetenv("JOURNAL_STREAM");
	log_init("stopcock", false); /* back to the defaults for other tests */
	text[0] = '\0';
	FILE *f = fopen(c->path, "r");
	if (f) {
		size_t n = fread(text, 1, sizeof text - 1, f);
		text[n] = '\0';
		fclose(f);
	}
	unlink(c->path);
	return text;
}

TEST(log_journal_lines_carry_priority_prefix)
{
	struct captured c = {0};
	REQUIRE(capture_start(&c, true));
	log_init("stopcockd", false);
	log_warn("station sim1 run %d: probe silent", 12);
	log_err("station sim1: halt failed");
	log_debug("pump <- Q"); /* not verbose: dropped */
	log_init("stopcockd", true);
	log_debug("pump <- Q");
	const char *got = capture_end(&c);
	CHECK_STR(got, "<4>station sim1 run 12: probe silent\n"
	               "<3>station sim1: halt failed\n"
	               "<7>pump <- Q\n");
}

TEST(log_folds_newlines_into_one_line)
{
	struct captured c = {0};
	REQUIRE(capture_start(&c, true));
	log_init("stopcockd", false);
	log_info("bad reply \"a\r\nb\"");
	CHECK_STR(capture_end(&c), "<6>bad reply \"a  b\"\n");
}

TEST(log_without_journal_has_timestamp_and_level)
{
	struct captured c = {0};
	REQUIRE(capture_start(&c, false));
	log_init("stopcockd", false);
	log_notice("station sim1: ready");
	const char *got = capture_end(&c);
	/* 2026-12-01T21:46:40.123Z stopcockd notice: station sim1: ready */
	CHECK(strlen(got) == 25 + strlen("stopcockd notice: station sim1: ready\n"));
	CHECK(got[4] == '-' && got[10] == 'T' && got[19] == '.' && got[23] == 'Z');
	CHECK_STR(got + 25, "stopcockd notice: station sim1: ready\n");
}

TEST(log_journal_stream_of_another_file_is_ignored)
{
	/* JOURNAL_STREAM inherited from a parent but stderr redirected elsewhere
	 * (e.g. `stopcockd 2>file` in a unit's shell): no prefixes. */
	struct captured c = {0};
	REQUIRE(capture_start(&c, false));
	setenv("JOURNAL_STREAM", "1:1", 1);
	log_init("stopcockd", false);
	log_warn("x");
	const char *got = capture_end(&c);
	CHECK(got[0] != '<');
	CHECK(strstr(got, "stopcockd warning: x\n") != NULL);
}
