/* harness.h: the unit-test harness. One binary runs every test file in tests/unit.
 *
 *   TEST(name) { CHECK(x > 0); CHECK_NEAR(ph, 4.76, 0.01); }
 *
 * Tests register themselves; `unit_tests [SUBSTRING]` runs those whose name
 * contains SUBSTRING. A failed CHECK marks the test failed and goes on, so
 * one run shows every failed check; REQUIRE returns from the test at once.
 * The last line is "N passed, N failed"; exit status 1 if any failed.
 * STOPCOCK_QUICK=1 (set under valgrind) lets long property tests shrink.
 */
#ifndef STOPCOCK_HARNESS_H
#define STOPCOCK_HARNESS_H

#include <math.h>
#include <stdbool.h>
#include <string.h>

typedef void (*harness_fn)(void);

void harness_register(const char *name, const char *file, harness_fn fn);
void harness_fail(const char *file, int line, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
/* True when STOPCOCK_QUICK is set: loops of hundreds may run tens instead. */
bool harness_quick(void);

#define TEST(name)                                                                                 \
	static void test_##name(void);                                                             \
	__attribute__((constructor)) static void harness_reg_##name(void)                          \
	{                                                                                          \
		harness_register(#name, __FILE__, test_##name);                                    \
	}                                                                                          \
	static void test_##name(void)

#define CHECK(cond)                                                                                \
	do {                                                                                       \
		if (!(cond))                                                                       \
			harness_fail(__FILE__, __LINE__, "CHECK(%s)", #cond);                      \
	} while (0)

#define REQUIRE(cond)                                                                              \
	do {                                                                                       \
		if (!(cond)) {                                                                     \
			harness_fail(__FILE__, __LINE__, "REQUIRE(%s)", #cond);                    \
			return;                                                                    \
		}                                                                                  \
	} while (0)

#define CHECK_NEAR(a, b, tol)                                                                      \
	do {                                                                                       \
		double h_a_ = (a), h_b_ = (b), h_t_ = (tol);                                       \
		if (!(fabs(h_a_ - h_b_) <= h_t_))                                                  \
			harness_fail(__FILE__, __LINE__,                                           \
			             "CHECK_NEAR(%s, %s, %s): %.9g vs %.9g (diff %.3g)", #a, #b,   \
			             #tol, h_a_, h_b_, h_a_ - h_b_);                               \
	} while (0)

#define CHECK_INT(a, b)                                                                            \
	do {                                                                                       \
		long long h_a_ = (long long)(a), h_b_ = (long long)(b);                            \
		if (h_a_ != h_b_)                                                                  \
			harness_fail(__FILE__, __LINE__, "CHECK_INT(%s, %s): %lld vs %lld", #a,    \
			             #b, h_a_, h_b_);                                              \
	} while (0)

#define CHECK_STR(a, b)                                                                            \
	do {                                                                                       \
		const char *h_a_ = (a), *h_b_ = (b);                                               \
		if (!h_a_ || !h_b_ || strcmp(h_a_, h_b_) != 0)                                     \
			harness_fail(__FILE__, __LINE__,                                           \
			             "CHECK_STR(%s, %s):\n    got:    \"%s\"\n    wanted: \"%s\"", \
			             #a, #b, h_a_ ? h_a_ : "(null)", h_b_ ? h_b_ : "(null)");      \
	} while (0)

#endif
