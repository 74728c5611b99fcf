/* Replay an annotated device transcript (tests/data/drivers/NAME.transcript) through
 * a pty: a fake device thread checks each command the driver sends and
 * answers from the transcript, so a profile is tested byte for byte: the
 * pump's second profile (CR terminators, an init command, volumes in uL),
 * the sample changer's (config/changers/sim.yaml) and the balance's
 * (config/balances/sim.yaml). */
#include <poll.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "drv.h"
#include "harness.h"
#include "sim.h"
#include "clock.h"

#define MAX_STEPS 64

typedef struct replay {
	int master;
	char cmd_end;          /* the byte that ends a command */
	const char *reply_end; /* appended to each '<' line */
	char kind[MAX_STEPS];  /* '>', '<' or '~' */
	char text[MAX_STEPS][160];
	int n;
	int done;           /* steps replayed */
	char mismatch[400]; /* first difference, "" when none */
} replay_t;

static int load(replay_t *r, const char *path)
{
	FILE *f = fopen(path, "r");
	if (!f)
		return -1;
	char line[160];
	while (fgets(line, sizeof(line), f) && r->n < MAX_STEPS) {
		line[strcspn(line, "\n")] = '\0';
		if ((line[0] != '>' && line[0] != '<' && line[0] != '~') || line[1] != ' ')
			continue;
		r->kind[r->n] = line[0];
		snprintf(r->text[r->n], sizeof(r->text[0]), "%s", line + 2);
		r->n++;
	}
	fclose(f);
	return 0;
}

/* Read one command ending in `end` from the master, 2 s at most. */
static int read_cmd(int fd, char end, char *out, size_t cap)
{
	size_t n = 0;
	double until = clock_mono_s() + 2.0;
	while (clock_mono_s() < until) {
		struct pollfd pf = {.fd = fd, .events = POLLIN};
		if (poll(&pf, 1, 50) <= 0)
			continue;
		char c;
		if (read(fd, &c, 1) != 1)
			continue;
		if (c == end) {
			out[n] = '\0';
			return 0;
		}
		if (n < cap - 1)
			out[n++] = c;
	}
	return -1;
}

static void *pump(void *arg)
{
	replay_t *r = arg;
	for (int i = 0; i < r->n; i++) {
		if (r->kind[i] == '>') {
			char got[160];
			if (read_cmd(r->master, r->cmd_end, got, sizeof(got)) != 0) {
				snprintf(r->mismatch, sizeof(r->mismatch),
				         "step %d: nothing sent, "
				         "wanted '%s'",
				         i, r->text[i]);
				return NULL;
			}
			if (strcmp(got, r->text[i]) != 0) {
				snprintf(r->mismatch, sizeof(r->mismatch),
				         "step %d: sent '%s', wanted '%s'", i, got, r->text[i]);
				return NULL;
			}
		} else {
			char out[200];
			int n = snprintf(out, sizeof(out), "%s%s", r->text[i],
			                 r->kind[i] == '<' ? r->reply_end : "");
			if (write(r->master, out, (size_t)n) != n)
				return NULL;
		}
		r->done = i + 1;
	}
	return NULL;
}

TEST(drv_transcript_generic_ascii)
{
	static replay_t r;
	memset(&r, 0, sizeof(r));
	r.cmd_end = '\r';
	r.reply_end = "\r";
	REQUIRE(load(&r, "tests/data/drivers/generic-ascii.transcript") == 0);
	REQUIRE(r.n > 10);
	char link[128];
	int slave;
	snprintf(link, sizeof(link), "/tmp/stopcock-unit-transcript-%d", (int)getpid());
	REQUIRE(sim_pty_open(link, &r.master, &slave) == 0);
	pthread_t th;
	pthread_create(&th, NULL, pump, &r);

	char cfg[300];
	snprintf(cfg, sizeof(cfg),
	         "{driver: pump-serial, port: %s, timeout_ms: 500, retries: 0, "
	         "profile: config/pumps/generic-ascii.yaml}",
	         link);
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	diag_list_t d = DIAG_LIST_INIT;
	drv_burette_t b;
	memset(&b, 0, sizeof(b));
	drv_err_t e;
	drv_burette_status_t st;
	if (yt_load_buffer("t.yaml", cfg, strlen(cfg), &doc, &d) != 0 ||
	    drv_burette_configure(&doc, doc.root, &b, &d) != 0) {
		diag_print(&d, stderr);
		CHECK(0);
		goto out;
	}
	CHECK(drv_burette_open(&b, &e) == DRV_OK);
	CHECK(drv_burette_dose(&b, 0.05, &e) == DRV_OK);
	CHECK(drv_burette_status(&b, &st, &e) == DRV_OK);
	CHECK(st.moving);
	CHECK_NEAR(st.dispensed_ml, 0.025, 1e-12);
	CHECK(drv_burette_status(&b, &st, &e) == DRV_OK);
	CHECK(!st.moving);
	CHECK_NEAR(st.dispensed_ml, 0.05, 1e-12);
	CHECK_NEAR(st.contents_ml, 4.95, 1e-12);
	CHECK(drv_burette_refill(&b, &e) == DRV_OK);
	CHECK(drv_burette_status(&b, &st, &e) == DRV_OK); /* valve done: fill starts */
	CHECK(st.moving && st.refilling);
	CHECK(drv_burette_status(&b, &st, &e) == DRV_OK); /* full: valve out */
	CHECK(st.moving && st.refilling);
	CHECK(drv_burette_status(&b, &st, &e) == DRV_OK); /* done */
	CHECK(!st.moving && !st.refilling);
	CHECK_NEAR(st.contents_ml, 5.0, 1e-12);
	CHECK_NEAR(st.dispensed_ml, 0.05, 1e-12); /* a refill is not a dose */
	CHECK(drv_burette_status(&b, &st, &e) == DRV_DEVICE_ERROR);
	CHECK(strstr(e.msg, "error 7") && strstr(e.msg, "motor stalled"));
	drv_status_t hs = drv_burette_halt(&b, &e);
	if (hs != DRV_OK)
		fprintf(stderr, "halt: %s: %s\n", drv_status_name(hs), e.msg);
	CHECK(hs == DRV_OK);
out:
	pthread_join(th, NULL);
	CHECK_STR(r.mismatch, "");
	CHECK_INT(r.done, r.n);
	drv_burette_close(&b);
	yt_free(&doc);
	diag_free(&d);
	close(r.master);
	close(slave);
	unlink(link);
}

TEST(drv_transcript_changer_sim)
{
	static replay_t r;
	memset(&r, 0, sizeof(r));
	r.cmd_end = '\n';
	r.reply_end = "\r\n";
	REQUIRE(load(&r, "tests/data/drivers/changer-sim.transcript") == 0);
	REQUIRE(r.n > 20);
	char link[128];
	int slave;
	snprintf(link, sizeof(link), "/tmp/stopcock-unit-transcript-ch-%d", (int)getpid());
	REQUIRE(sim_pty_open(link, &r.master, &slave) == 0);
	pthread_t th;
	pthread_create(&th, NULL, pump, &r);

	char cfg[300];
	snprintf(cfg, sizeof(cfg),
	         "{driver: changer-serial, port: %s, timeout_ms: 500, retries: 0, "
	         "profile: config/changers/sim.yaml, positions: 12}",
	         link);
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	diag_list_t d = DIAG_LIST_INIT;
	drv_changer_t c;
	memset(&c, 0, sizeof(c));
	drv_err_t e;
	drv_changer_status_t st;
	drv_changer_info_t info;
	if (yt_load_buffer("t.yaml", cfg, strlen(cfg), &doc, &d) != 0 ||
	    drv_changer_configure(&doc, doc.root, &c, &d) != 0) {
		diag_print(&d, stderr);
		CHECK(0);
		goto out;
	}
	drv_changer_info(&c, &info);
	CHECK_INT(info.positions, 12);
	CHECK(info.has_rinse && info.has_waste);
	CHECK(drv_changer_open(&c, &e) == DRV_OK);
	/* beyond the rack the station configures: refused before any byte */
	CHECK(drv_changer_move(&c, 13, &e) == DRV_CONFIG);
	CHECK(strstr(e.msg, "outside 1..12") != NULL);
	CHECK(drv_changer_move(&c, 3, &e) == DRV_OK);
	CHECK(drv_changer_status(&c, &st, &e) == DRV_OK);
	CHECK(st.moving && st.lift == DRV_LIFT_UP);
	CHECK_INT(st.position, 1);
	CHECK(drv_changer_status(&c, &st, &e) == DRV_OK);
	CHECK(!st.moving && st.position == 3);
	CHECK(drv_changer_lift(&c, true, &e) == DRV_OK);
	CHECK(drv_changer_status(&c, &st, &e) == DRV_OK);
	CHECK(st.moving && st.lift == DRV_LIFT_BETWEEN);
	CHECK(drv_changer_status(&c, &st, &e) == DRV_OK);
	CHECK(!st.moving && st.lift == DRV_LIFT_DOWN);
	/* the head is down: the driver asks, then refuses without a GO */
	CHECK(drv_changer_move(&c, 4, &e) == DRV_CONFIG);
	CHECK(strstr(e.msg, "head is down") != NULL);
	CHECK(drv_changer_pump(&c, DRV_CHANGER_RINSE, 2.5, &e) == DRV_OK);
	CHECK(drv_changer_pump(&c, DRV_CHANGER_WASTE, 0, &e) == DRV_CONFIG);
	CHECK(drv_changer_pump(&c, DRV_CHANGER_WASTE, 1.0, &e) == DRV_OK);
	CHECK(drv_changer_lift(&c, false, &e) == DRV_OK);
	CHECK(drv_changer_status(&c, &st, &e) == DRV_OK);
	CHECK(!st.moving && st.lift == DRV_LIFT_UP && !st.fault);
	/* a jam: the move is accepted, the next status reports the error */
	CHECK(drv_changer_move(&c, 5, &e) == DRV_OK);
	CHECK(drv_changer_status(&c, &st, &e) == DRV_DEVICE_ERROR);
	CHECK(st.fault);
	CHECK(strstr(e.msg, "error 6") && strstr(e.msg, "move jammed"));
	CHECK(drv_changer_halt(&c, &e) == DRV_OK);
	/* a refusal by the device itself */
	CHECK(drv_changer_move(&c, 7, &e) == DRV_DEVICE_ERROR);
	CHECK(strstr(e.msg, "error 2") && strstr(e.msg, "GO 7"));
out:
	pthread_join(th, NULL);
	CHECK_STR(r.mismatch, "");
	CHECK_INT(r.done, r.n);
	drv_changer_close(&c);
	yt_free(&doc);
	diag_free(&d);
	close(r.master);
	close(slave);
	unlink(link);
}

TEST(drv_transcript_balance_sim)
{
	static replay_t r;
	memset(&r, 0, sizeof(r));
	r.cmd_end = '\n';
	r.reply_end = "\r\n";
	REQUIRE(load(&r, "tests/data/drivers/balance-sim.transcript") == 0);
	REQUIRE(r.n > 10);
	char link[128];
	int slave;
	snprintf(link, sizeof(link), "/tmp/stopcock-unit-transcript-bal-%d", (int)getpid());
	REQUIRE(sim_pty_open(link, &r.master, &slave) == 0);
	pthread_t th;
	pthread_create(&th, NULL, pump, &r);

	char cfg[300];
	snprintf(cfg, sizeof(cfg),
	         "{driver: balance-serial, port: %s, timeout_ms: 300, retries: 1, "
	         "stable_timeout_ms: 3000, profile: config/balances/sim.yaml}",
	         link);
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	diag_list_t d = DIAG_LIST_INIT;
	drv_balance_t b;
	memset(&b, 0, sizeof(b));
	drv_err_t e;
	drv_weight_t w;
	if (yt_load_buffer("t.yaml", cfg, strlen(cfg), &doc, &d) != 0 ||
	    drv_balance_configure(&doc, doc.root, &b, &d) != 0) {
		diag_print(&d, stderr);
		CHECK(0);
		goto out;
	}
	CHECK(drv_balance_open(&b, &e) == DRV_OK);
	CHECK(drv_balance_weigh(&b, &w, &e) == DRV_OK);
	CHECK_NEAR(w.value, 10.012, 1e-12);
	CHECK_STR(w.unit, "g");
	CHECK(drv_balance_weigh(&b, &w, &e) == DRV_OK);
	CHECK_NEAR(w.value, 250.3, 1e-12);
	CHECK_STR(w.unit, "mg");
	CHECK(drv_balance_weigh(&b, &w, &e) == DRV_DEVICE_ERROR);
	CHECK(strstr(e.msg, "error 4") && strstr(e.msg, "overload"));
	CHECK(w.value == 0 && w.unit[0] == '\0');
out:
	pthread_join(th, NULL);
	CHECK_STR(r.mismatch, "");
	CHECK_INT(r.done, r.n);
	drv_balance_close(&b);
	yt_free(&doc);
	diag_free(&d);
	close(r.master);
	close(slave);
	unlink(link);
}
