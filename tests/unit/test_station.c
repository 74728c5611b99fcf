/* test_station.c: the station's volume interlock (a pure function). */
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
