/* The profile-driven balance driver against the simulator's balance, in
 * process, over a real pseudo-terminal: a stable weight, a pan that settles
 * after a few questions, one that never settles in time, garbage bytes and a
 * mute line, each fault a clear bounded error and never a weight. */
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "balance_profile.h"
#include "clock.h"
#include "drv.h"
#include "harness.h"
#include "scenario.h"
#include "sim.h"

static const char scen_text[] =
    "sample_ml: 10\nwater_ml: 40\n"
    "sample:\n  - {name: hydrochloric acid, molar: 0.1, strong: acid}\n"
    "titrant:\n  - {name: sodium hydroxide, molar: 0.1, strong: base}\n";

typedef struct fixture {
	sim_t sim;
	chem_scenario_t scen;
	pthread_t th;
	char link[128];
	yt_doc_t doc;
	drv_balance_t b;
} fixture_t;

static int setup(fixture_t *f, double fixed_g, int settle, long stable_timeout_ms)
{
	memset(f, 0, sizeof(*f));
	diag_list_t d = DIAG_LIST_INIT;
	if (scenario_parse("s.yaml", scen_text, strlen(scen_text), &f->scen, &d) != 0 ||
	    sim_init(&f->sim, &f->scen, 5) != 0) {
		diag_print(&d, stderr);
		diag_free(&d);
		return -1;
	}
	f->sim.balance.present = true;
	f->sim.balance.fixed_g = fixed_g;
	f->sim.balance.settle = f->sim.balance.settle_left = settle;
	snprintf(f->link, sizeof(f->link), "/tmp/stopcock-unit-balance-%d", (int)getpid());
	snprintf(f->sim.balance_link, sizeof(f->sim.balance_link), "%s", f->link);
	pthread_create(&f->th, NULL, sim_balance_thread, &f->sim);
	for (int i = 0; i < 200 && access(f->link, F_OK) != 0; i++)
		usleep(5000);
	char cfg[512];
	snprintf(cfg, sizeof(cfg),
	         "{driver: balance-serial, port: %s, timeout_ms: 300, retries: 1, "
	         "stable_timeout_ms: %ld, profile: config/balances/sim.yaml}",
	         f->link, stable_timeout_ms);
	int rc = yt_load_buffer("station.yaml", cfg, strlen(cfg), &f->doc, &d);
	if (rc == 0)
		rc = drv_balance_configure(&f->doc, f->doc.root, &f->b, &d);
	if (rc)
		diag_print(&d, stderr);
	diag_free(&d);
	return rc;
}

static void teardown(fixture_t *f)
{
	drv_balance_close(&f->b);
	yt_free(&f->doc);
	atomic_store(&f->sim.stop, true);
	pthread_join(f->th, NULL);
	sim_free(&f->sim);
}

TEST(drv_balance_sim_stable_weight)
{
	fixture_t f;
	REQUIRE(setup(&f, 10.012, 0, 2000) == 0);
	drv_err_t e;
	drv_weight_t w;
	REQUIRE(drv_balance_open(&f.b, &e) == DRV_OK);
	CHECK(drv_balance_weigh(&f.b, &w, &e) == DRV_OK);
	CHECK_NEAR(w.value, 10.012, 1e-9);
	CHECK_STR(w.unit, "g");
	teardown(&f);
}

TEST(drv_balance_sim_settles_then_stable)
{
	fixture_t f;
	REQUIRE(setup(&f, 0.5031, 3, 3000) == 0);
	drv_err_t e;
	drv_weight_t w;
	REQUIRE(drv_balance_open(&f.b, &e) == DRV_OK);
	CHECK(drv_balance_weigh(&f.b, &w, &e) == DRV_OK);
	CHECK_NEAR(w.value, 0.5031, 1e-9);
	/* All three settling replies were used up on the way: the pan swung. */
	pthread_mutex_lock(&f.sim.mu);
	int left = f.sim.balance.settle_left;
	pthread_mutex_unlock(&f.sim.mu);
	CHECK_INT(left, 3); /* reset for the next weighing */
	teardown(&f);
}

TEST(drv_balance_sim_never_settles_is_an_error)
{
	fixture_t f;
	REQUIRE(setup(&f, 10.0, 1000, 300) == 0);
	drv_err_t e = {0};
	drv_weight_t w;
	REQUIRE(drv_balance_open(&f.b, &e) == DRV_OK);
	double t0 = clock_mono_s();
	CHECK(drv_balance_weigh(&f.b, &w, &e) == DRV_TIMEOUT);
	CHECK(clock_mono_s() - t0 < 5.0); /* bounded; a broken loop would hang */
	CHECK(strstr(e.msg, "did not settle") != NULL);
	CHECK(w.value == 0 && w.unit[0] == '\0');
	teardown(&f);
}

static void set_fault(fixture_t *f, sim_fault_t k)
{
	sim_set_fault(&f->sim, k, 0);
}

TEST(drv_balance_sim_garbage_and_mute)
{
	fixture_t f;
	REQUIRE(setup(&f, 10.0, 0, 2000) == 0);
	drv_err_t e = {0};
	drv_weight_t w;
	REQUIRE(drv_balance_open(&f.b, &e) == DRV_OK);
	set_fault(&f, SIM_FAULT_BALANCE_GARBAGE);
	CHECK(drv_balance_weigh(&f.b, &w, &e) == DRV_BAD_REPLY);
	CHECK(strstr(e.msg, "balance: ") == e.msg);
	CHECK(strstr(e.msg, "unreadable") != NULL);
	CHECK(w.unit[0] == '\0');
	set_fault(&f, SIM_FAULT_MUTE_BALANCE);
	double t0 = clock_mono_s();
	CHECK(drv_balance_weigh(&f.b, &w, &e) == DRV_TIMEOUT);
	CHECK(clock_mono_s() - t0 < 5.0);
	CHECK(strstr(e.msg, "no reply to 'WEIGH'") != NULL);
	/* The line is back: a weight again. */
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(drv_balance_weigh(&f.b, &w, &e) == DRV_OK);
	CHECK_NEAR(w.value, 10.0, 1e-9);
	teardown(&f);
}

/* A stable reply whose text is not a number and a known unit is no weight. */
TEST(drv_balance_reply_parse)
{
	balance_profile_t p;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(balance_profile_load("config/balances/sim.yaml", &p, &d) == 0);
	diag_free(&d);
	balance_reply_t r;
	CHECK(balance_parse_reply(&p, "STABLE 10.0120 g", &r) == BALANCE_REPLY_STABLE);
	CHECK_NEAR(r.value, 10.012, 1e-12);
	CHECK(balance_parse_reply(&p, "xx\x01STABLE  +250.1 mg ", &r) == BALANCE_REPLY_STABLE);
	CHECK_NEAR(r.value, 250.1, 1e-12);
	CHECK_STR(r.unit, "mg");
	CHECK(balance_parse_reply(&p, "STABLE 10.0120 lb", &r) == BALANCE_REPLY_UNKNOWN);
	CHECK(balance_parse_reply(&p, "STABLE 1x.0 g", &r) == BALANCE_REPLY_UNKNOWN);
	CHECK(balance_parse_reply(&p, "STABLE g", &r) == BALANCE_REPLY_UNKNOWN);
	CHECK(balance_parse_reply(&p, "SETTLING", &r) == BALANCE_REPLY_UNSTABLE);
	CHECK(balance_parse_reply(&p, "FAULT 4 overload", &r) == BALANCE_REPLY_ERROR);
	CHECK_INT(r.code, 4);
	CHECK_STR(r.text, "overload");
}

/* A profile whose stable reply carries no {text} has nowhere for a weight. */
TEST(drv_balance_profile_needs_text)
{
	static const char bad[] = "name: x\ncommand_end: \"\\n\"\nreply_end: \"\\n\"\n"
	                          "commands: {weigh: W}\n"
	                          "replies: {error: \"E {code}\", unstable: U, stable: S}\n";
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(yt_load_buffer("bal.yaml", bad, strlen(bad), &doc, &d) == 0);
	balance_profile_t p;
	CHECK(balance_profile_parse(&doc, &p, &d) != 0);
	CHECK(d.n >= 1 && strstr(d.v[0].msg, "replies.stable must end in {text}") != NULL);
	CHECK(d.n >= 1 && strstr(d.v[0].file, "bal.yaml") != NULL);
	diag_free(&d);
	yt_free(&doc);
}

/* With a rack, the pan holds the weight of the position the changer is at,
 * else the fixed weight; the simulator's own command, no pty. */
TEST(sim_balance_weighs_the_changer_position)
{
	sim_t s;
	chem_scenario_t scen;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(scenario_parse("s.yaml", scen_text, strlen(scen_text), &scen, &d) == 0);
	REQUIRE(sim_init(&s, &scen, 5) == 0);
	s.balance.present = true;
	s.balance.fixed_g = 1.0;
	s.balance.weight_g[3] = 0.2041;
	s.changer.present = true;
	s.changer.pos = 3;
	char reply[128];
	CHECK(sim_balance_command(&s, "WEIGH", reply, sizeof reply));
	CHECK_STR(reply, "STABLE 0.2041 g");
	s.changer.pos = 4;
	CHECK(sim_balance_command(&s, "WEIGH", reply, sizeof reply));
	CHECK_STR(reply, "STABLE 1.0000 g");
	CHECK(sim_balance_command(&s, "TARE", reply, sizeof reply));
	CHECK_STR(reply, "FAULT 1 unknown command");
	s.fault = SIM_FAULT_MUTE_BALANCE;
	CHECK(!sim_balance_command(&s, "WEIGH", reply, sizeof reply));
	s.changer.present = false; /* no rack: sim_free frees the bench's own beaker */
	sim_free(&s);
	diag_free(&d);
}
