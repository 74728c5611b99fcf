/* test_station.c: the station's volume interlock and halt retry (pure functions). */
#include <math.h>

#include "harness.h"
#include "station.h"

TEST(station_interlock_lets_doses_within_the_limits)
{
	double ok = -1;
	CHECK_INT(station_dose_interlock(0.0, 0.25, 25.0, 150.0, 0.0005, &ok), 0);
	CHECK_NEAR(ok, 0.25, 1e-12);
	/* exactly reaching the limit is allowed */
	CHECK_INT(station_dose_interlock(24.75, 0.25, 25.0, 150.0, 0.0005, &ok), 0);
	CHECK_NEAR(ok, 0.25, 1e-12);
}

TEST(station_interlock_cuts_to_whole_steps_that_fit)
{
	double ok = -1;
	/* 0.1234 mL left under volume_max_ml: 246 steps of 0.0005 mL */
	CHECK_INT(station_dose_interlock(24.8766, 0.5, 25.0, 150.0, 0.0005, &ok), 0);
	CHECK_NEAR(ok, 0.123, 1e-9);
	CHECK(ok <= 25.0 - 24.8766);
	/* the vessel is the tighter limit */
	CHECK_INT(station_dose_interlock(9.9, 0.5, 25.0, 10.0, 0.0005, &ok), 0);
	CHECK_NEAR(ok, 0.1, 1e-9);
}

TEST(station_interlock_refuses_when_nothing_fits)
{
	double ok = -1;
	CHECK_INT(station_dose_interlock(25.0, 0.01, 25.0, 150.0, 0.0005, &ok), -1);
	CHECK_INT(station_dose_interlock(24.9999, 0.01, 25.0, 150.0, 0.0005, &ok), -1);
	CHECK_INT(station_dose_interlock(30.0, 0.01, 25.0, 150.0, 0.0005, &ok), -1);
	CHECK_NEAR(ok, 0.0, 0.0);
	CHECK_INT(station_dose_interlock(0.0, NAN, 25.0, 150.0, 0.0005, &ok), -1);
	CHECK_INT(station_dose_interlock(0.0, -0.1, 25.0, 150.0, 0.0005, &ok), -1);
	CHECK_INT(station_dose_interlock(0.0, 0.1, 25.0, 150.0, 0.0, &ok), -1);
}

TEST(station_halt_retry_is_short_and_bounded)
{
	/* the first retry comes at once (a line back in a moment is caught) */
	CHECK_NEAR(station_halt_retry_s(1), STATION_HALT_RETRY_MIN_S, 1e-12);
	CHECK(station_halt_retry_s(2) > station_halt_retry_s(1));
	/* never longer than the bound, however long the outage */
	for (int n = 0; n < 100000; n += 997) {
		CHECK(station_halt_retry_s(n) > 0);
		CHECK(station_halt_retry_s(n) <= STATION_HALT_RETRY_MAX_S);
	}
	CHECK_NEAR(station_halt_retry_s(1000000), STATION_HALT_RETRY_MAX_S, 1e-12);
	CHECK_NEAR(station_halt_retry_s(-5), STATION_HALT_RETRY_MIN_S, 1e-12);
}

TEST(station_rack_turns_only_with_the_head_up_and_every_dosing_unit_halted)
{
	CHECK(station_move_allowed(DRV_LIFT_UP, false, false));
	CHECK(!station_move_allowed(DRV_LIFT_DOWN, false, false));
	CHECK(!station_move_allowed(DRV_LIFT_BETWEEN, false, false));
	CHECK(!station_move_allowed(DRV_LIFT_UP, true, false)); /* still moving */
	CHECK(!station_move_allowed(DRV_LIFT_UP, false, true)); /* a doser or the burette */
	CHECK(!station_move_allowed(DRV_LIFT_DOWN, true, true));
}

TEST(station_head_goes_down_only_where_a_run_or_the_rack_names)
{
	/* the run's position, the rack's rinse (15) and park (16) */
	CHECK(station_lower_allowed(3, 3, 15, 16));
	CHECK(station_lower_allowed(15, 3, 15, 16));
	CHECK(station_lower_allowed(16, 3, 15, 16));
	/* any other beaker, or no position at all */
	CHECK(!station_lower_allowed(4, 3, 15, 16));
	CHECK(!station_lower_allowed(0, 0, 0, 0));
	CHECK(!station_lower_allowed(5, 0, 0, 0));
	/* a rack without rinse or park positions: 0 names none */
	CHECK(station_lower_allowed(7, 7, 0, 0));
	CHECK(!station_lower_allowed(8, 7, 0, 0));
}

TEST(station_addition_may_not_overflow_the_beaker)
{
	/* 40 mL of sample and additions in a 150 mL beaker */
	CHECK_INT(station_add_interlock(40.0, 25.0, 150.0), 0);
	CHECK_INT(station_add_interlock(125.0, 25.0, 150.0), 0); /* exactly full */
	CHECK_INT(station_add_interlock(125.0, 25.01, 150.0), -1);
	CHECK_INT(station_add_interlock(149.0, 2.0, 150.0), -1);
	CHECK_INT(station_add_interlock(0.0, 0.0, 150.0), -1); /* nothing to add */
	CHECK_INT(station_add_interlock(0.0, NAN, 150.0), -1);
	CHECK_INT(station_add_interlock(NAN, 1.0, 150.0), -1);
	CHECK_INT(station_add_interlock(500.0, 1.0, 0.0), 0); /* no vessel limit */
}
