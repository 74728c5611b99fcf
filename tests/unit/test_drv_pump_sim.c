/* The profile-driven pump driver against the simulator's pump, in process,
 * over a real pseudo-terminal: dose, motion time, refill through the valve,
 * the syringe's own limit, stall, noise and unplug with recovery. */
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "drv.h"
#include "harness.h"
#include "scenario.h"
#include "sim.h"
#include "clock.h"

static const char scen_text[] =
    "sample_ml: 10\nwater_ml: 40\n"
    "sample:\n  - {name: hydrochloric acid, molar: 0.01, strong: acid}\n"
    "titrant:\n  - {name: sodium hydroxide, molar: 0.1, strong: base}\n"
    "burette: {capacity_ml: 10.0, steps: 20000}\n";

typedef struct fixture {
	sim_t sim;
	pthread_t th;
	char link[128];
	yt_doc_t doc;
	drv_burette_t b;
} fixture_t;

static int setup(fixture_t *f, long timeout_ms)
{
	memset(f, 0, sizeof(*f));
	chem_scenario_t sc;
	diag_list_t d = DIAG_LIST_INIT;
	if (scenario_parse("scen.yaml", scen_text, strlen(scen_text), &sc, &d) != 0) {
		diag_print(&d, stderr);
		diag_free(&d);
		return -1;
	}
	if (sim_init(&f->sim, &sc, 7) != 0)
		return -1;
	snprintf(f->link, sizeof(f->link), "/tmp/stopcock-unit-pump-%d", (int)getpid());
	snprintf(f->sim.pump_link, sizeof(f->sim.pump_link), "%s", f->link);
	pthread_create(&f->th, NULL, sim_pump_thread, &f->sim);
	for (int i = 0; i < 200 && access(f->link, F_OK) != 0; i++)
		usleep(5000);
	char cfg[512];
	/* dose_rate 60 mL/min: 1 mL per second keeps the test short */
	snprintf(cfg, sizeof(cfg),
	         "{driver: pump-serial, port: %s, timeout_ms: %ld, retries: 2, "
	         "profile: config/pumps/sim.yaml, dose_rate_ml_min: 60, fill_rate_ml_min: 240}",
	         f->link, timeout_ms);
	int rc = yt_load_buffer("station.yaml", cfg, strlen(cfg), &f->doc, &d);
	if (rc == 0)
		rc = drv_burette_configure(&f->doc, f->doc.root, &f->b, &d);
	if (rc)
		diag_print(&d, stderr);
	diag_free(&d);
	return rc;
}

static void teardown(fixture_t *f)
{
	drv_burette_close(&f->b);
	yt_free(&f->doc);
	atomic_store(&f->sim.stop, true);
	pthread_join(f->th, NULL);
	sim_free(&f->sim);
}

static void set_fault(fixture_t *f, sim_fault_t k)
{
	sim_set_fault(&f->sim, k, 0);
}

static drv_status_t wait_idle(fixture_t *f, drv_burette_status_t *st, double max_s)
{
	drv_err_t e;
	double t0 = clock_mono_s();
	drv_status_t rc;
	do {
		rc = drv_burette_status(&f->b, st, &e);
		if (rc != DRV_OK || !st->moving)
			return rc;
		usleep(20000);
	} while (clock_mono_s() - t0 < max_s);
	return DRV_TIMEOUT;
}

TEST(drv_pump_sim_dose_refill)
{
	fixture_t f;
	REQUIRE(setup(&f, 300) == 0);
	drv_err_t e;
	drv_burette_status_t st;
	drv_burette_info_t info;
	drv_burette_info(&f.b, &info);
	CHECK_NEAR(info.capacity_ml, 10.0, 0);
	CHECK_INT(info.steps, 20000);
	REQUIRE(drv_burette_open(&f.b, &e) == DRV_OK);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_OK);
	CHECK_NEAR(st.contents_ml, 10.0, 1e-9);
	CHECK_NEAR(st.dispensed_ml, 0.0, 1e-9);

	/* 0.25 mL at 1 mL/s: moving at first, done after ~0.25 s */
	double t0 = clock_mono_s();
	REQUIRE(drv_burette_dose(&f.b, 0.25, &e) == DRV_OK);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_OK);
	CHECK(st.moving);
	CHECK(wait_idle(&f, &st, 3) == DRV_OK);
	double took = clock_mono_s() - t0;
	CHECK(took > 0.2);
	CHECK_NEAR(st.dispensed_ml, 0.25, 1e-9);
	CHECK_NEAR(st.contents_ml, 9.75, 1e-9);
	pthread_mutex_lock(&f.sim.mu);
	CHECK_NEAR(beaker_titrant_ml(f.sim.beaker), 0.25, 1e-9); /* the beaker got it */
	pthread_mutex_unlock(&f.sim.mu);

	/* back-to-back doses without a status poll between them */
	REQUIRE(drv_burette_dose(&f.b, 0.05, &e) == DRV_OK);
	CHECK(drv_burette_dose(&f.b, 0.05, &e) == DRV_DEVICE_ERROR); /* still moving */
	usleep(200000);
	CHECK(drv_burette_dose(&f.b, 0.05, &e) == DRV_OK);
	CHECK(wait_idle(&f, &st, 3) == DRV_OK);
	CHECK_NEAR(st.dispensed_ml, 0.35, 1e-9);

	/* more than the syringe holds: refused before anything moves */
	CHECK(drv_burette_dose(&f.b, 9.9, &e) == DRV_CONFIG);
	CHECK(strstr(e.msg, "refill") != NULL);

	/* refill: valve in, fill, valve out; the dispensed counter does not move */
	REQUIRE(drv_burette_refill(&f.b, &e) == DRV_OK);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_OK);
	CHECK(st.refilling);
	CHECK(wait_idle(&f, &st, 5) == DRV_OK);
	CHECK(!st.refilling);
	CHECK_NEAR(st.contents_ml, 10.0, 1e-9);
	CHECK_NEAR(st.dispensed_ml, 0.35, 1e-9);
	pthread_mutex_lock(&f.sim.mu);
	CHECK(!f.sim.pump.valve_in);
	CHECK_NEAR(beaker_titrant_ml(f.sim.beaker), 0.35, 1e-9);
	pthread_mutex_unlock(&f.sim.mu);

	/* halt mid-dose: stops short, counts what left */
	REQUIRE(drv_burette_dose(&f.b, 2.0, &e) == DRV_OK);
	usleep(300000);
	CHECK(drv_burette_halt(&f.b, &e) == DRV_OK);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_OK);
	CHECK(!st.moving);
	CHECK(st.dispensed_ml > 0.35 + 0.1 && st.dispensed_ml < 0.35 + 1.5);
	pthread_mutex_lock(&f.sim.mu);
	CHECK_NEAR(beaker_titrant_ml(f.sim.beaker), st.dispensed_ml, 1e-9);
	pthread_mutex_unlock(&f.sim.mu);
	teardown(&f);
}

TEST(drv_pump_sim_faults)
{
	fixture_t f;
	REQUIRE(setup(&f, 200) == 0);
	drv_err_t e;
	drv_burette_status_t st;
	REQUIRE(drv_burette_open(&f.b, &e) == DRV_OK);

	/* stall: a device error, at once; gone after clear */
	set_fault(&f, SIM_FAULT_STALL);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_DEVICE_ERROR);
	CHECK(strstr(e.msg, "stall") != NULL);
	CHECK(drv_burette_dose(&f.b, 0.1, &e) == DRV_DEVICE_ERROR);
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_OK);
	CHECK(!st.fault);

	/* mute: timeout within (1 + retries) x timeout_ms */
	set_fault(&f, SIM_FAULT_MUTE_PUMP);
	double t0 = clock_mono_s();
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_TIMEOUT);
	double took = clock_mono_s() - t0;
	CHECK(took >= 0.6 && took < 0.6 + 0.5);
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_OK);

	/* noise: garbage before replies and lost replies; retries cover it and
	 * a dose is never doubled */
	set_fault(&f, SIM_FAULT_NOISE);
	int ok = 0;
	for (int i = 0; i < 10; i++) {
		drv_status_t r = drv_burette_status(&f.b, &st, &e);
		CHECK(r == DRV_OK || r == DRV_BAD_REPLY || r == DRV_TIMEOUT);
		ok += r == DRV_OK;
	}
	CHECK(ok >= 8);
	double before = st.dispensed_ml;
	drv_status_t r = drv_burette_dose(&f.b, 0.1, &e);
	CHECK(r == DRV_OK);
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(wait_idle(&f, &st, 3) == DRV_OK);
	CHECK_NEAR(st.dispensed_ml - before, 0.1, 1e-9);

	/* unplug: the pty goes away -> unplugged; back after clear */
	set_fault(&f, SIM_FAULT_UNPLUG);
	usleep(100000);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_UNPLUGGED);
	set_fault(&f, SIM_FAULT_NONE);
	r = DRV_UNPLUGGED;
	for (int i = 0; i < 50 && r != DRV_OK; i++) {
		usleep(20000);
		r = drv_burette_status(&f.b, &st, &e);
	}
	CHECK(r == DRV_OK);
	CHECK_NEAR(st.dispensed_ml - before, 0.1, 1e-9);
	teardown(&f);
}

TEST(drv_pump_sim_restart_mid_refill)
{
	/* A daemon that died mid-refill left the valve at the reservoir: the
	 * first halt of a fresh driver turns it back to the outlet, so the next
	 * dose goes into the beaker, not back into the bottle. */
	fixture_t f;
	REQUIRE(setup(&f, 300) == 0);
	pthread_mutex_lock(&f.sim.mu);
	f.sim.pump.valve_in = true;
	pthread_mutex_unlock(&f.sim.mu);
	drv_err_t e;
	drv_burette_status_t st;
	REQUIRE(drv_burette_open(&f.b, &e) == DRV_OK);
	CHECK(drv_burette_dose(&f.b, 0.1, &e) == DRV_DEVICE_ERROR); /* the pump refuses */
	CHECK(strstr(e.msg, "valve") != NULL);
	CHECK(drv_burette_halt(&f.b, &e) == DRV_OK);
	pthread_mutex_lock(&f.sim.mu);
	CHECK(!f.sim.pump.valve_in);
	pthread_mutex_unlock(&f.sim.mu);
	CHECK(drv_burette_dose(&f.b, 0.1, &e) == DRV_OK);
	CHECK(wait_idle(&f, &st, 3) == DRV_OK);
	CHECK_NEAR(st.dispensed_ml, 0.1, 1e-9);
	teardown(&f);
}

/* Wait until the driver's line answers again after an unplug. */
static drv_status_t status_until_back(fixture_t *f, drv_burette_status_t *st)
{
	drv_err_t e;
	drv_status_t r = DRV_UNPLUGGED;
	for (int i = 0; i < 100 && r != DRV_OK; i++) {
		usleep(20000);
		r = drv_burette_status(&f->b, st, &e);
	}
	return r;
}

TEST(drv_pump_sim_reopen_halts_a_dose_first)
{
	/* The line goes while the plunger doses: the pump goes on. The first
	 * command on the reopened line is the halt, so the plunger stops as
	 * soon as the line is back, and the count is the pump's position. */
	fixture_t f;
	REQUIRE(setup(&f, 200) == 0);
	drv_err_t e;
	drv_burette_status_t st;
	REQUIRE(drv_burette_open(&f.b, &e) == DRV_OK);
	REQUIRE(drv_burette_dose(&f.b, 2.0, &e) == DRV_OK); /* 2 s at 60 mL/min */
	usleep(200000);
	set_fault(&f, SIM_FAULT_UNPLUG);
	usleep(300000);
	CHECK(drv_burette_status(&f.b, &st, &e) == DRV_UNPLUGGED);
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(status_until_back(&f, &st) == DRV_OK);
	pthread_mutex_lock(&f.sim.mu);
	bool moving = f.sim.pump.moving;
	double in_beaker_ml = beaker_titrant_ml(f.sim.beaker);
	pthread_mutex_unlock(&f.sim.mu);
	CHECK(!moving);
	CHECK(!st.moving);
	CHECK(in_beaker_ml > 0.3 && in_beaker_ml < 1.9);
	CHECK_NEAR(st.dispensed_ml, in_beaker_ml, 0.0005 + 1e-9);
	usleep(200000);
	pthread_mutex_lock(&f.sim.mu);
	CHECK_NEAR(beaker_titrant_ml(f.sim.beaker), in_beaker_ml, 1e-12);
	pthread_mutex_unlock(&f.sim.mu);
	teardown(&f);
}

TEST(drv_pump_sim_reopen_mid_refill_turns_the_valve_out)
{
	fixture_t f;
	REQUIRE(setup(&f, 200) == 0);
	drv_err_t e;
	drv_burette_status_t st;
	REQUIRE(drv_burette_open(&f.b, &e) == DRV_OK);
	REQUIRE(drv_burette_dose(&f.b, 8.0, &e) == DRV_OK);
	pthread_mutex_lock(&f.sim.mu);
	f.sim.pump.speed = 8000; /* empty the syringe quickly */
	pthread_mutex_unlock(&f.sim.mu);
	REQUIRE(wait_idle(&f, &st, 5) == DRV_OK);
	REQUIRE(drv_burette_refill(&f.b, &e) == DRV_OK);
	/* valve in, then filling 8 mL at 240 mL/min: 2 s */
	for (int i = 0; i < 50; i++) {
		REQUIRE(drv_burette_status(&f.b, &st, &e) == DRV_OK);
		pthread_mutex_lock(&f.sim.mu);
		bool filling = f.sim.pump.moving && f.sim.pump.valve_in;
		pthread_mutex_unlock(&f.sim.mu);
		if (filling)
			break;
		usleep(20000);
	}
	set_fault(&f, SIM_FAULT_UNPLUG);
	usleep(300000);
	set_fault(&f, SIM_FAULT_NONE);
	CHECK(status_until_back(&f, &st) == DRV_OK);
	pthread_mutex_lock(&f.sim.mu);
	CHECK(!f.sim.pump.moving);
	CHECK(!f.sim.pump.valve_in);
	pthread_mutex_unlock(&f.sim.mu);
	CHECK(!st.refilling);
	/* the driver is ready to dose again */
	CHECK(drv_burette_dose(&f.b, 0.1, &e) == DRV_OK);
	CHECK(wait_idle(&f, &st, 3) == DRV_OK);
	teardown(&f);
}
