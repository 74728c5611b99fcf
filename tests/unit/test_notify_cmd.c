/* test_notify_cmd.c: the alarms' config keys (notify_command,
 * notify_timeout_s) and which audit-trail events reach a person
 * (daemon/server/notify_cmd.h). The program itself is run in
 * tests/e2e/test_series.py. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "config.h"
#include "harness.h"
#include "notify_cmd.h"

static const char station[] = "stations:\n"
                              "  - name: bench-1\n"
                              "    vessel_max_ml: 100\n"
                              "    burette: {driver: x}\n"
                              "    probe: {driver: y}\n";

static int load(const char *dir, const char *head, cfg_t *c, diag_list_t *d)
{
	char path[128];
	snprintf(path, sizeof path, "%s/c.yaml", dir);
	FILE *f = fopen(path, "w");
	if (!f)
		return -2;
	fputs(head, f);
	fputs(station, f);
	fclose(f);
	int rc = cfg_load(path, c, d);
	unlink(path);
	return rc;
}

TEST(notify_command_config)
{
	char dir[] = "/tmp/stopcock-notify-XXXXXX";
	static cfg_t c;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(mkdtemp(dir));

	CHECK(load(dir, "", &c, &d) == 0);
	CHECK_INT(c.n_notify_argv, 0);
	CHECK_NEAR(c.notify_timeout_s, CFG_NOTIFY_TIMEOUT_S, 0);
	cfg_free(&c);

	/* A list: the program, resolved against the file's folder, and its
	 * arguments as written (no shell splits or expands them). */
	CHECK(load(dir, "notify_command: [bin/alarm, --to, \"lab $HOME\"]\nnotify_timeout_s: 3\n",
	           &c, &d) == 0);
	CHECK_INT(d.n, 0);
	CHECK_INT(c.n_notify_argv, 3);
	char want[256];
	snprintf(want, sizeof want, "%s/bin/alarm", dir);
	CHECK_STR(c.notify_argv[0], want);
	CHECK_STR(c.notify_argv[2], "lab $HOME");
	CHECK_NEAR(c.notify_timeout_s, 3, 0);
	cfg_free(&c);

	CHECK(load(dir, "notify_command: /usr/local/bin/alarm\n", &c, &d) == 0);
	CHECK_INT(c.n_notify_argv, 1);
	CHECK_STR(c.notify_argv[0], "/usr/local/bin/alarm");
	cfg_free(&c);

	CHECK(load(dir, "notify_command: []\nnotify_timeout_s: 0\n", &c, &d) != 0);
	{
		char *all = diag_join(&d);
		REQUIRE(all);
		CHECK(strstr(all, ":1:") && strstr(all, "notify_command must list the program"));
		CHECK(strstr(all, ":2:") && strstr(all, "notify_timeout_s"));
		free(all);
	}
	diag_free(&d);
	cfg_free(&c);
	rmdir(dir);
}

TEST(notify_command_events_of_the_audit_trail)
{
	CHECK_STR(notify_cmd_event_of("run", "failed"), "run_failed");
	CHECK_STR(notify_cmd_event_of("fault", "probe_timeout"), "device_fault");
	CHECK_STR(notify_cmd_event_of("series", "finished"), "series_finished");
	CHECK_STR(notify_cmd_event_of("series", "failed"), "series_stopped");
	CHECK_STR(notify_cmd_event_of("series", "aborted"), "series_stopped");
	CHECK_STR(notify_cmd_event_of("series", "interrupted"), "series_stopped");
	/* What a person need not be woken for. */
	CHECK(!notify_cmd_event_of("run", "finished"));
	CHECK(!notify_cmd_event_of("run", "started"));
	CHECK(!notify_cmd_event_of("series", "queued"));
	CHECK(!notify_cmd_event_of("series", "next"));
	CHECK(!notify_cmd_event_of("method", "stored"));
	CHECK(!notify_cmd_event_of(NULL, "failed"));
}

TEST(notify_command_disk_and_calibration_thresholds)
{
	const double mib = 1048576.0;
	/* 5 % of the disk or 200 MiB, whichever is more. */
	CHECK(!notify_cmd_disk_low(10000 * mib, 100000 * mib));
	CHECK(notify_cmd_disk_low(4999 * mib, 100000 * mib));
	CHECK(notify_cmd_disk_low(199 * mib, 2000 * mib)); /* 10 % but under 200 MiB */
	CHECK(!notify_cmd_disk_low(300 * mib, 2000 * mib));
	CHECK(!notify_cmd_disk_low(0, 0)); /* no size known: nothing to say */
	/* Told in the last 2 h of a calibration's validity, not after it expired. */
	const double now = 1.8e9;
	CHECK(notify_cmd_expiring(now + 3600, now));
	CHECK(notify_cmd_expiring(now + 7200, now));
	CHECK(!notify_cmd_expiring(now + 7201, now));
	CHECK(!notify_cmd_expiring(now - 1, now));
	CHECK(!notify_cmd_expiring(0, now));
	/* A titer or blank: in its last day. */
	CHECK(notify_cmd_titer_expiring(now + 86400, now));
	CHECK(notify_cmd_titer_expiring(now + 7201, now));
	CHECK(!notify_cmd_titer_expiring(now + 86401, now));
	CHECK(!notify_cmd_titer_expiring(now - 1, now));
}
