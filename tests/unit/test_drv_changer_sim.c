/* The profile-driven changer driver against the simulator's changer, in
 * process, over a real pseudo-terminal: move, lift, pumps, status, the
 * driver's own interlock, the probe in the lowered beaker or in air, each
 * changer fault ending in a clear error (never a hang); and the rack file's
 * errors with file:line:col. */
#include <math.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "changer_profile.h"
#include "drv.h"
#include "harness.h"
#include "scenario.h"
#include "sim.h"
#include "clock.h"

/* Two beakers far apart in pH, so the probe's beaker is plain to see; a
 * quick electrode (tau 0.05 s) so the reading follows within the test. */
static const char acid_text[] = "sample_ml: 10\nwater_ml: 40\n"
                                "sample:\n  - {name: hydrochloric acid, molar: 0.1, strong: acid}\n"
                                "titrant:\n  - {name: sodium hydroxide, molar: 0.1, strong: base}\n"
                                "electrode: {tau_s: 0.05}\n";
static const char base_text[] =
    "sample_ml: 10\nwater_ml: 40\n"
    "sample:\n  - {name: sodium hydroxide, molar: 0.1, strong: base}\n"
    "titrant:\n  - {name: hydrochloric acid, molar: 0.1, strong: acid}\n"
    "electrode: {tau_s: 0.05}\n";

typedef struct fixture {
	sim_t sim;
	chem_scenario_t acid, base;
	pthread_t th;
	char link[128];
	yt_doc_t doc;
	drv_changer_t c;
} fixture_t;

static int setup(fixture_t *f)
{
	memset(f, 0, sizeof(*f));
	diag_list_t d = DIAG_LIST_INIT;
	if (scenario_parse("acid.yaml", acid_text, strlen(acid_text), &f->acid, &d) != 0 ||
	    scenario_parse("base.yaml", base_text, strlen(base_text), &f->base, &d) != 0) {
		diag_print(&d, stderr);
		diag_free(&d);
		return -1;
	}
	sim_rack_t rack;
	memset(&rack, 0, sizeof(rack));
	rack.scen[1] = &f->acid;
	rack.scen[2] = &f->base;
	rack.first = 1;
	rack.rinse = 15;
	rack.park = 16;
	if (sim_init(&f->sim, &f->acid, 11) != 0 || sim_changer_attach(&f->sim, &rack, 11) != 0)
		return -1;
	snprintf(f->link, sizeof(f->link), "/tmp/stopcock-unit-changer-%d", (int)getpid());
	snprintf(f->sim.changer_link, sizeof(f->sim.changer_link), "%s", f->link);
	pthread_create(&f->th, NULL, sim_changer_thread, &f->sim);
	for (int i = 0; i < 200 && access(f->link, F_OK) != 0; i++)
		usleep(5000);
	char cfg[512];
	snprintf(cfg, sizeof(cfg),
	         "{driver: changer-serial, port: %s, timeout_ms: 300, retries: 1, "
	         "profile: config/changers/sim.yaml}",
	         f->link);
	int rc = yt_load_buffer("station.yaml", cfg, strlen(cfg), &f->doc, &d);
	if (rc == 0)
		rc = drv_changer_configure(&f->doc, f->doc.root, &f->c, &d);
	if (rc)
		diag_print(&d, stderr);
	diag_free(&d);
	return rc;
}

static void teardown(fixture_t *f)
{
	drv_changer_close(&f->c);
	yt_free(&f->doc);
	atomic_store(&f->sim.stop, true);
	pthread_join(f->th, NULL);
	sim_free(&f->sim);
}

static void set_fault(fixture_t *f, sim_fault_t k)
{
	sim_set_fault(&f->sim, k, 0);
}

/* Poll until nothing moves (or an error); max_s bounds a broken test only. */
static drv_status_t wait_still(fixture_t *f, drv_changer_status_t *st, double max_s, drv_err_t *e)
{
	double t0 = clock_mono_s();
	drv_status_t rc;
	do {
		rc = drv_changer_status(&f->c, st, e);
		if (rc != DRV_OK || !st->moving)
			return rc;
		usleep(20000);
	} while (clock_mono_s() - t0 < max_s);
	return DRV_TIMEOUT;
}

/* The measured potential, after letting the transmitter measure a while. */
static double mv_after(fixture_t *f, double wait_s)
{
	usleep((useconds_t)(wait_s * 1e6));
	pthread_mutex_lock(&f->sim.mu);
	sim_tick(&f->sim, clock_mono_s());
	double mv = f->sim.mv;
	pthread_mutex_unlock(&f->sim.mu);
	return mv;
}

static const beaker_t *probe_beaker(fixture_t *f)
{
	pthread_mutex_lock(&f->sim.mu);
	const beaker_t *b = f->sim.beaker;
	pthread_mutex_unlock(&f->sim.mu);
	return b;
}

TEST(drv_changer_sim_move_lift_pump)
{
	fixture_t f;
	REQUIRE(setup(&f) == 0);
	drv_err_t e;
	drv_changer_status_t st;
	drv_changer_info_t info;
	drv_changer_info(&f.c, &info);
	CHECK_INT(info.positions, 16);
	REQUIRE(drv_changer_open(&f.c, &e) == DRV_OK);
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_OK);
	CHECK_INT(st.position, 16); /* parked */
	CHECK(st.lift == DRV_LIFT_UP && !st.moving && !st.fault);
	CHECK(probe_beaker(&f) == NULL); /* in air */

	/* head up: the electrode in air drifts and never settles */
	double lo = 1e9, hi = -1e9;
	for (int i = 0; i < 8; i++) {
		double mv = mv_after(&f, 0.12);
		lo = fmin(lo, mv);
		hi = fmax(hi, mv);
	}
	CHECK(hi - lo > 1.0);

	REQUIRE(drv_changer_move(&f.c, 1, &e) == DRV_OK);
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_OK);
	CHECK(st.moving);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_OK);
	CHECK_INT(st.position, 1);
	CHECK(probe_beaker(&f) == NULL); /* still up */

	REQUIRE(drv_changer_lift(&f.c, true, &e) == DRV_OK);
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_OK);
	CHECK(st.moving && st.lift == DRV_LIFT_BETWEEN);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_OK);
	CHECK(st.lift == DRV_LIFT_DOWN);
	CHECK(probe_beaker(&f) == f.sim.changer.beakers[1]);
	double acid_mv = mv_after(&f, 0.5);

	/* the driver's interlock: no move with the head down; the rack stays */
	CHECK(drv_changer_move(&f.c, 2, &e) == DRV_CONFIG);
	CHECK(strstr(e.msg, "head is down") != NULL);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_OK);
	CHECK_INT(st.position, 1);

	/* the rinse pump runs for its time, then stops */
	REQUIRE(drv_changer_pump(&f.c, DRV_CHANGER_RINSE, 0.3, &e) == DRV_OK);
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_OK);
	CHECK(st.moving);
	double t0 = clock_mono_s();
	CHECK(wait_still(&f, &st, 5, &e) == DRV_OK);
	CHECK(clock_mono_s() - t0 > 0.2);

	REQUIRE(drv_changer_lift(&f.c, false, &e) == DRV_OK);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_OK);
	CHECK(st.lift == DRV_LIFT_UP);
	REQUIRE(drv_changer_move(&f.c, 2, &e) == DRV_OK);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_OK);
	REQUIRE(drv_changer_lift(&f.c, true, &e) == DRV_OK);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_OK);
	CHECK(st.position == 2 && st.lift == DRV_LIFT_DOWN);
	CHECK(probe_beaker(&f) == f.sim.changer.beakers[2]);
	/* pH ~1.7 against ~12.3: some 600 mV apart at 100 % slope */
	double base_mv = mv_after(&f, 0.5);
	CHECK(acid_mv - base_mv > 400.0);
	teardown(&f);
}

TEST(drv_changer_sim_faults)
{
	fixture_t f;
	REQUIRE(setup(&f) == 0);
	drv_err_t e;
	drv_changer_status_t st;
	REQUIRE(drv_changer_open(&f.c, &e) == DRV_OK);

	/* a jammed rack: accepted, then the status reports it; halt clears it */
	set_fault(&f, SIM_FAULT_JAM);
	REQUIRE(drv_changer_move(&f.c, 3, &e) == DRV_OK);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_DEVICE_ERROR);
	CHECK(st.fault);
	CHECK(strstr(e.msg, "move jammed") != NULL);
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(drv_changer_halt(&f.c, &e) == DRV_OK);
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_OK);
	CHECK(!st.fault);
	CHECK_INT(st.position, 16); /* it never left */

	/* a stuck lift: the error, and after halt the head is between, so the
	 * rack refuses to turn */
	set_fault(&f, SIM_FAULT_STUCK_LIFT);
	REQUIRE(drv_changer_lift(&f.c, true, &e) == DRV_OK);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_DEVICE_ERROR);
	CHECK(strstr(e.msg, "lift stuck") != NULL);
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(drv_changer_halt(&f.c, &e) == DRV_OK);
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_OK);
	CHECK(st.lift == DRV_LIFT_BETWEEN);
	CHECK(drv_changer_move(&f.c, 1, &e) == DRV_CONFIG);
	CHECK(strstr(e.msg, "head is between") != NULL);
	CHECK(probe_beaker(&f) == NULL);
	CHECK(drv_changer_lift(&f.c, false, &e) == DRV_OK);
	CHECK(wait_still(&f, &st, 5, &e) == DRV_OK);
	CHECK(st.lift == DRV_LIFT_UP);

	/* a silent line: a timeout naming the command, within the retries */
	set_fault(&f, SIM_FAULT_MUTE_CHANGER);
	double t0 = clock_mono_s();
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_TIMEOUT);
	CHECK(strstr(e.msg, "no reply to 'WHERE'") != NULL);
	CHECK(drv_changer_move(&f.c, 1, &e) == DRV_TIMEOUT);
	CHECK(clock_mono_s() - t0 < 10.0); /* bounded by the deadlines, not a hang */
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_OK);

	/* unplugged: the line is gone, and comes back by itself */
	set_fault(&f, SIM_FAULT_UNPLUG);
	usleep(100000);
	drv_status_t rc = drv_changer_status(&f.c, &st, &e);
	CHECK(rc == DRV_UNPLUGGED || rc == DRV_TIMEOUT);
	set_fault(&f, SIM_FAULT_NONE);
	usleep(100000);
	CHECK(drv_changer_status(&f.c, &st, &e) == DRV_OK);
	teardown(&f);
}

/* ---- rack files ---- */

static int rack_text(const char *text, char **msg)
{
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	diag_list_t d = DIAG_LIST_INIT;
	sim_rack_t r;
	/* named inside tests/data so the scenario paths resolve from there */
	int rc = yt_load_buffer("tests/data/rack.yaml", text, strlen(text), &doc, &d);
	if (rc == 0)
		rc = sim_rack_parse(&doc, &r, &d);
	if (rc == 0)
		sim_rack_free(&r);
	*msg = diag_join(&d);
	diag_free(&d);
	yt_free(&doc);
	return rc;
}

TEST(sim_rack_file)
{
	char *msg = NULL;
	sim_rack_t r;
	diag_list_t d = DIAG_LIST_INIT;
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	const char *good = "positions:\n  3: ../../config/scenarios/water-blank.yaml\n"
	                   "  1: scenarios/cider.yaml\nrinse: 15\npark: 16\n";
	REQUIRE(yt_load_buffer("tests/data/rack.yaml", good, strlen(good), &doc, &d) == 0);
	CHECK(sim_rack_parse(&doc, &r, &d) == 0);
	diag_print(&d, stderr);
	CHECK(r.scen[1] && r.scen[3] && !r.scen[2]);
	CHECK_INT(r.first, 1);
	CHECK_INT(r.rinse, 15);
	CHECK_INT(r.park, 16);
	CHECK(r.weight_g[1] == 0); /* no weights: key, no weight */
	sim_rack_free(&r);
	yt_free(&doc);
	const char *weighed =
	    "positions:\n  1: scenarios/cider.yaml\nweights: {1: 10.012, 5: 0.2041}\n";
	REQUIRE(yt_load_buffer("tests/data/rack.yaml", weighed, strlen(weighed), &doc, &d) == 0);
	CHECK(sim_rack_parse(&doc, &r, &d) == 0);
	CHECK_NEAR(r.weight_g[1], 10.012, 1e-12);
	CHECK_NEAR(r.weight_g[5], 0.2041, 1e-12);
	CHECK(r.weight_g[2] == 0);
	sim_rack_free(&r);
	yt_free(&doc);
	diag_free(&d);

	static const struct {
		const char *text, *want;
	} bad[] = {
	    {"positions:\n  one: scenarios/cider.yaml\n",
	     "tests/data/rack.yaml:2:3: a position must be a position number 1..16 (got one)"},
	    {"positions:\n  17: scenarios/cider.yaml\n", "rack.yaml:2:3: a position must be"},
	    {"positions:\n  1: nope.yaml\n",
	     "tests/data/rack.yaml:2:6: position 1: scenario 'nope.yaml' cannot be used"},
	    {"positions:\n  1: scenarios/cider.yaml\nrinse: 1\n",
	     "tests/data/rack.yaml:3:8: rinse: position 1 holds a sample (scenarios/cider.yaml)"},
	    {"positions:\n  1: scenarios/cider.yaml\nrinse: 15\npark: 15\n",
	     "tests/data/rack.yaml:4:7: park: position 15 is the rinse position too"},
	    {"positions:\n  1: scenarios/cider.yaml\nparc: 16\n", "tests/data/rack.yaml:3:1:"},
	    {"rinse: 15\n", "missing key 'positions'"},
	    {"positions: {}\n", "the rack holds no beaker"},
	    {"positions:\n  1: scenarios/cider.yaml\npark: -2\n",
	     "tests/data/rack.yaml:3:7: park must be a position number 1..16 (got -2)"},
	    {"positions:\n  1: scenarios/cider.yaml\nweights: {1: heavy}\n",
	     "tests/data/rack.yaml:3:14: weights: position 1 wants grams above 0 (got heavy)"},
	    {"positions:\n  1: scenarios/cider.yaml\nweights: {0: 1.5}\n",
	     "tests/data/rack.yaml:3:11: a position must be a position number 1..16 (got 0)"},
	};
	for (size_t i = 0; i < sizeof(bad) / sizeof(bad[0]); i++) {
		CHECK(rack_text(bad[i].text, &msg) != 0);
		if (!msg || !strstr(msg, bad[i].want)) {
			fprintf(stderr, "case %zu: got \"%s\"\n", i, msg ? msg : "(none)");
			CHECK(0);
		}
		free(msg);
		msg = NULL;
	}
}

/* ---- carry-over, on the simulator's own clock (no threads) ---- */

/* One changer command, then time enough for it to finish. */
static void step(sim_t *s, const char *cmd)
{
	char reply[128];
	REQUIRE(sim_changer_command(s, cmd, reply, sizeof(reply)));
	if (strcmp(reply, "OK") != 0)
		fprintf(stderr, "'%s' -> '%s'\n", cmd, reply);
	CHECK_STR(reply, "OK");
	sim_tick(s, s->last_tick_s + 2.0);
}

static void visit(sim_t *s, const char *go)
{
	step(s, "HEAD UP");
	step(s, go);
	step(s, "HEAD DOWN");
}

/* Millimoles of the component named `name` in the beaker at `pos`. */
static double mmol_of(sim_t *s, long pos, const char *name)
{
	const chem_scenario_t *sc = beaker_scenario(s->changer.beakers[pos]);
	double n = 0;
	for (int i = 0; i < sc->n_sample; i++)
		if (!strcmp(sc->sample[i].name, name))
			n += sc->sample[i].molar * sc->sample_ml;
	return n;
}

TEST(sim_changer_carry_over)
{
	/* without a rinse: beaker 1's solution goes into beaker 2 */
	fixture_t f;
	memset(&f, 0, sizeof(f));
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(scenario_parse("acid.yaml", acid_text, strlen(acid_text), &f.acid, &d) == 0);
	REQUIRE(scenario_parse("base.yaml", base_text, strlen(base_text), &f.base, &d) == 0);
	for (int rinse = 0; rinse < 3; rinse++) {
		sim_rack_t rack;
		memset(&rack, 0, sizeof(rack));
		rack.scen[1] = &f.acid;
		rack.scen[2] = &f.base;
		rack.first = 1;
		rack.rinse = 15;
		REQUIRE(sim_init(&f.sim, &f.acid, 3) == 0);
		REQUIRE(sim_changer_attach(&f.sim, &rack, 3) == 0);
		double ph_before = beaker_true_ph(f.sim.changer.beakers[2]);
		visit(&f.sim, "GO 1");
		if (rinse == 1) { /* at the rinse position */
			visit(&f.sim, "GO 15");
		} else if (rinse == 2) { /* with the rinse pump */
			step(&f.sim, "RINSE 500");
		}
		visit(&f.sim, "GO 2");
		CHECK(f.sim.beaker == f.sim.changer.beakers[2]);
		/* 0.05 mL of 0.1 M x 10/50 HCl: 0.001 mmol */
		double carried = mmol_of(&f.sim, 2, "hydrochloric acid");
		double naoh = mmol_of(&f.sim, 2, "sodium hydroxide");
		CHECK_NEAR(naoh, 1.0, 1e-12); /* its own sample keeps its amount */
		if (rinse == 0) {
			CHECK_NEAR(carried, SIM_CARRY_ML * 0.1 * 10.0 / 50.0, 1e-12);
			CHECK_NEAR(f.sim.changer.carried_ml, SIM_CARRY_ML, 1e-12);
			CHECK(beaker_true_ph(f.sim.changer.beakers[2]) < ph_before - 1e-6);
		} else {
			CHECK_NEAR(carried, 0.0, 0);
			CHECK_NEAR(f.sim.changer.carried_ml, 0.0, 0);
			CHECK_NEAR(beaker_true_ph(f.sim.changer.beakers[2]), ph_before, 1e-12);
		}
		/* back into the same beaker: nothing more is carried */
		step(&f.sim, "HEAD UP");
		step(&f.sim, "HEAD DOWN");
		CHECK_NEAR(mmol_of(&f.sim, 2, "hydrochloric acid"), carried, 1e-15);
		sim_free(&f.sim);
	}
	diag_free(&d);
}

TEST(changer_profile_errors)
{
	changer_profile_t p;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(changer_profile_load("config/changers/sim.yaml", &p, &d) == 0);
	CHECK_INT(p.positions, 16);
	CHECK_STR(p.move, "GO {position}");
	/* a pump placeholder in a move, a status reply without {lift}, no halt */
	const char *bad = "name: x\ncommand_end: \"\\n\"\nreply_end: \"\\n\"\npositions: 8\n"
	                  "commands:\n  move: \"GO {steps}\"\n  lift_up: U\n  lift_down: D\n"
	                  "  status: W\nreplies:\n  ok: OK\n  error: \"E {code}\"\n"
	                  "  moving: \"M {position}\"\n  idle: \"I {position} {lift}\"\n";
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	REQUIRE(yt_load_buffer("bad.yaml", bad, strlen(bad), &doc, &d) == 0);
	CHECK(changer_profile_parse(&doc, &p, &d) != 0);
	char *msg = diag_join(&d);
	REQUIRE(msg != NULL);
	CHECK(strstr(msg, "bad.yaml:6:9: commands.move: unknown placeholder in \"GO {steps}\" "
	                  "(allowed: {position}, {seconds}, {ms})") != NULL);
	CHECK(strstr(msg, "missing key 'halt'") != NULL);
	CHECK(strstr(msg, "bad.yaml:13:11: replies.moving must contain {lift}") != NULL);
	if (!strstr(msg, "replies.moving must contain {lift}"))
		fprintf(stderr, "%s\n", msg);
	free(msg);
	yt_free(&doc);
	diag_free(&d);
}
