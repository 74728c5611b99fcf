/* sim_pump.c: the simulated bench's clock and its syringe pump (see sim.h).
 *
 * The pump speaks config/pumps/sim.yaml's protocol on a pseudo-terminal. It
 * knows its own stroke: it refuses to dose more than the syringe holds or to
 * fill beyond a full stroke, and titrant reaches the beaker only through the
 * outlet valve, in real time as the plunger moves. */
#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <poll.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <termios.h>
#include <time.h>
#include <unistd.h>

#include "sim.h"
#include "clock.h"

static const char *const fault_names[SIM_FAULT_COUNT] = {
    NULL,           "noise",          "mute-pump", "mute-probe", "slow-probe", "modbus-exception",
    "stall",        "frozen-probe",   "unplug",    "jam",        "stuck-lift", "mute-changer",
    "mute-balance", "balance-garbage"};

const char *sim_fault_name(sim_fault_t f)
{
	return (f > SIM_FAULT_NONE && f < SIM_FAULT_COUNT) ? fault_names[f] : NULL;
}

sim_fault_t sim_fault_parse(const char *s)
{
	for (int i = 1; i < SIM_FAULT_COUNT; i++)
		if (!strcmp(fault_names[i], s))
			return (sim_fault_t)i;
	return SIM_FAULT_COUNT;
}

static unsigned rng_next(sim_t *s)
{
	/* xorshift64*: garbage bytes only; quality does not matter */
	s->rng ^= s->rng >> 12;
	s->rng ^= s->rng << 25;
	s->rng ^= s->rng >> 27;
	return (unsigned)((s->rng * 2685821657736338717ULL) >> 32);
}

static void put_float(uint16_t *r, double v)
{
	float f = (float)v;
	uint32_t u;
	memcpy(&u, &f, sizeof(u));
	r[0] = (uint16_t)(u >> 16);
	r[1] = (uint16_t)(u & 0xffff);
}

/* An electrode in air: no liquid junction, so an unsteady potential that
 * drifts without bound of its own (a random walk, held to a plausible span)
 * plus noise; never a steady reading a titration could take. */
static double air_mv(sim_t *s)
{
	double step = ((double)(rng_next(s) % 2001) / 1000.0 - 1.0) * SIM_AIR_STEP_MV;
	double v = s->changer.air_mv + step;
	if (v > SIM_AIR_LIMIT_MV || v < -SIM_AIR_LIMIT_MV)
		v = s->changer.air_mv - step;
	s->changer.air_mv = v;
	return v + ((double)(rng_next(s) % 1001) / 1000.0 - 0.5) * 2.0;
}

static void measure(sim_t *s)
{
	double mv = s->beaker ? beaker_mv(s->beaker) : air_mv(s);
	double t_c = s->beaker ? beaker_temperature_c(s->beaker) : s->scen.temperature_c;
	const chem_electrode_t *e = &s->scen.electrode;
	double ph = chem_ph_from_mv(e->offset_mv, e->slope_pct, mv, t_c);
	s->mv = mv;
	put_float(&s->regs[SIM_REG_MV], mv);
	put_float(&s->regs[SIM_REG_PH], ph);
	put_float(&s->regs[SIM_REG_TEMP], t_c);
	s->regs[SIM_REG_STATUS] = 0;
	s->regs[SIM_REG_COUNTER] = ++s->counter;
	double x10 = round(mv * 10.0);
	if (x10 > 32767)
		x10 = 32767;
	if (x10 < -32768)
		x10 = -32768;
	s->regs[SIM_REG_MV_X10] = (uint16_t)(int16_t)x10;
	uint32_t uv = (uint32_t)(int32_t)lround(mv * 1000.0);
	s->regs[SIM_REG_MV_UV] = (uint16_t)(uv & 0xffff); /* little word order: low first */
	s->regs[SIM_REG_MV_UV + 1] = (uint16_t)(uv >> 16);
}

int sim_init(sim_t *s, const chem_scenario_t *scen, unsigned long long seed)
{
	memset(s, 0, sizeof(*s));
	pthread_mutex_init(&s->mu, NULL);
	s->scen = *scen;
	s->beaker = beaker_new(scen, seed);
	if (!s->beaker)
		return -1;
	s->rng = seed ? seed : 0x9e3779b97f4a7c15ULL;
	s->pump.steps = scen->burette.steps > 0 ? scen->burette.steps : 20000;
	s->pump.capacity_ml = scen->burette.capacity_ml > 0 ? scen->burette.capacity_ml : 10.0;
	s->pump.pos = s->pump.steps; /* starts full, valve at the outlet */
	s->pump.target = s->pump.pos;
	s->stir_rpm = 0;
	s->tcp_listen_fd = -1;
	s->last_tick_s = clock_mono_s();
	s->next_measure_s = s->last_tick_s;
	measure(s);
	atomic_store(&s->stop, false);
	return 0;
}

void sim_free(sim_t *s)
{
	if (s->changer.present) {
		/* s->beaker points into the rack (or is NULL) */
		for (int i = 0; i <= SIM_RACK_POSITIONS; i++)
			beaker_free(s->changer.beakers[i]);
		memset(s->changer.beakers, 0, sizeof(s->changer.beakers));
	} else {
		beaker_free(s->beaker);
	}
	s->beaker = NULL;
	pthread_mutex_destroy(&s->mu);
}

/* Move a plunger on by dt s; what leaves through the outlet goes into the
 * beaker under the head (titrant for the burette, doser < 0; the doser's
 * reagent for a doser), or onto the tray with the head up. A stall stops
 * the burette only (the fault names the burette's motor). */
static void advance(sim_t *s, sim_pump_t *p, int doser, double dt)
{
	if (p->moving && doser < 0 && s->fault == SIM_FAULT_STALL) {
		p->moving = false; /* the motor stalled where it was */
		p->target = p->pos;
		p->frac = 0;
	}
	if (!p->moving)
		return;
	double want = p->speed * dt + p->frac;
	long left = labs(p->target - p->pos);
	long n = (long)floor(want);
	if (n >= left) {
		n = left;
		p->frac = 0;
	} else {
		p->frac = want - (double)n;
	}
	if (p->target < p->pos) {
		p->pos -= n;
		double ml = (double)n * p->capacity_ml / (double)p->steps;
		if (p->valve_in) {
			/* back into the reservoir */
		} else if (doser >= 0) {
			sim_doser_t *d = &s->dosers[doser];
			d->dispensed_ml += ml;
			chem_comp_t reagent = d->reagent; /* beaker_add_reagent may change it */
			if (!s->beaker || ml <= 0 ||
			    beaker_add_reagent(s->beaker, &reagent, ml) != 0)
				s->changer.spilled_ml += ml > 0 ? ml : 0;
		} else if (s->beaker) { /* through the outlet into the beaker */
			beaker_add_ml(s->beaker, ml);
		} else { /* the head is up: onto the rack's tray */
			s->changer.spilled_ml += ml;
		}
	} else {
		p->pos += n;
	}
	if (p->pos == p->target)
		p->moving = false;
}

void sim_tick(sim_t *s, double t)
{
	double dt = t - s->last_tick_s;
	if (dt < 0)
		dt = 0;
	s->last_tick_s = t;
	if (s->fault_until_s > 0 && t >= s->fault_until_s) {
		s->fault = SIM_FAULT_NONE;
		s->fault_until_s = 0;
		s->next_measure_s = 0; /* thawed: measure at once (as on `clear`) */
	}
	if (s->changer.present)
		sim_changer_tick(s, dt);
	advance(s, &s->pump, -1, dt);
	for (int i = 0; i < s->n_dosers; i++)
		advance(s, &s->dosers[i].pump, i, dt);
	if (s->changer.present) {
		for (int i = 0; i <= SIM_RACK_POSITIONS; i++)
			if (s->changer.beakers[i])
				beaker_advance(s->changer.beakers[i], dt);
	} else {
		beaker_advance(s->beaker, dt);
	}
	if (t >= s->next_measure_s) {
		if (s->fault != SIM_FAULT_FROZEN_PROBE)
			measure(s);
		s->next_measure_s = t + SIM_MEASURE_S;
	}
}

static bool parse_two(const char *args, long *a, long *b)
{
	char *end;
	errno = 0;
	*a = strtol(args, &end, 10);
	if (errno || end == args)
		return false;
	const char *q = end;
	*b = strtol(q, &end, 10);
	if (errno || end == q)
		return false;
	while (*end == ' ')
		end++;
	return *end == '\0';
}

static bool command(sim_pump_t *p, bool stalled, const char *line, char *reply, size_t cap)
{
	long n, speed;
	if (!strcmp(line, "STAT")) {
		if (stalled)
			snprintf(reply, cap, "ERR 5 motor stall");
		else
			snprintf(reply, cap, "AT %ld %s", p->pos, p->moving ? "MOVING" : "IDLE");
	} else if (!strcmp(line, "HALT")) {
		p->moving = false;
		p->target = p->pos;
		p->frac = 0;
		snprintf(reply, cap, "OK");
	} else if (!strcmp(line, "VALVE IN") || !strcmp(line, "VALVE OUT")) {
		if (p->moving) {
			snprintf(reply, cap, "BUSY");
		} else {
			p->valve_in = !strcmp(line, "VALVE IN");
			snprintf(reply, cap, "OK");
		}
	} else if (!strncmp(line, "DOSE ", 5) || !strncmp(line, "FILL ", 5)) {
		bool dose = line[0] == 'D';
		if (!parse_two(line + 5, &n, &speed) || n < 1 || speed < 1)
			snprintf(reply, cap, "ERR 1 bad argument");
		else if (stalled)
			snprintf(reply, cap, "ERR 5 motor stall");
		else if (p->moving)
			snprintf(reply, cap, "BUSY");
		else if (dose && p->valve_in)
			snprintf(reply, cap, "ERR 4 valve at reservoir");
		else if (!dose && !p->valve_in)
			snprintf(reply, cap, "ERR 4 valve at outlet");
		else if (dose && n > p->pos)
			snprintf(reply, cap, "ERR 2 syringe holds only %ld steps", p->pos);
		else if (!dose && p->pos + n > p->steps)
			snprintf(reply, cap, "ERR 3 beyond full stroke");
		else {
			p->target = dose ? p->pos - n : p->pos + n;
			p->speed =
			    (double)(speed > SIM_PUMP_MAX_SPEED ? SIM_PUMP_MAX_SPEED : speed);
			p->frac = 0;
			p->moving = true;
			snprintf(reply, cap, "OK");
		}
	} else {
		snprintf(reply, cap, "ERR 1 unknown command");
	}
	return true;
}

bool sim_pump_command(sim_t *s, const char *line, char *reply, size_t cap)
{
	if (s->fault == SIM_FAULT_MUTE_PUMP || s->fault == SIM_FAULT_UNPLUG)
		return false;
	return command(&s->pump, s->fault == SIM_FAULT_STALL, line, reply, cap);
}

bool sim_doser_command(sim_t *s, int doser, const char *line, char *reply, size_t cap)
{
	if (doser < 0 || doser >= s->n_dosers || s->fault == SIM_FAULT_UNPLUG)
		return false;
	return command(&s->dosers[doser].pump, false, line, reply, cap);
}

int sim_dosers_attach(sim_t *s, const sim_rack_t *r, const char *base)
{
	s->n_dosers = 0;
	for (int i = 1; i <= SIM_RACK_POSITIONS; i++) {
		const chem_scenario_t *sc = r->scen[i];
		for (int k = 0; sc && k < sc->n_dosers; k++) {
			int j = 0;
			while (j < s->n_dosers && strcmp(s->dosers[j].name, sc->doser_name[k]))
				j++;
			if (j < s->n_dosers || s->n_dosers == SIM_MAX_DOSERS)
				continue;
			sim_doser_t *d = &s->dosers[s->n_dosers];
			memset(d, 0, sizeof(*d));
			snprintf(d->name, sizeof(d->name), "%s", sc->doser_name[k]);
			d->reagent = sc->doser[k];
			d->pump.steps = s->pump.steps;
			d->pump.capacity_ml = s->pump.capacity_ml;
			d->pump.pos = d->pump.steps; /* full, valve at the outlet */
			d->pump.target = d->pump.pos;
			char link[sizeof(d->link)];
			snprintf(link, sizeof(link), "%.400s.%s", base, sc->doser_name[k]);
			memcpy(d->link, link, sizeof(link));
			d->sim = s;
			d->index = s->n_dosers++;
		}
	}
	return s->n_dosers;
}

int sim_pty_open(const char *link_path, int *master, int *slave)
{
	int m = posix_openpt(O_RDWR | O_NOCTTY | O_CLOEXEC);
	if (m < 0)
		return -1;
	char name[128];
	if (grantpt(m) != 0 || unlockpt(m) != 0 || ptsname_r(m, name, sizeof(name)) != 0) {
		close(m);
		return -1;
	}
	/* Keep a slave open: master reads give EIO while no slave is open. */
	int sl = open(name, O_RDWR | O_NOCTTY | O_CLOEXEC);
	if (sl < 0) {
		close(m);
		return -1;
	}
	struct termios t;
	memset(&t, 0, sizeof(t));
	if (tcgetattr(sl, &t) == 0) {
		cfmakeraw(&t);
		tcsetattr(sl, TCSANOW, &t);
	}
	fcntl(m, F_SETFL, fcntl(m, F_GETFL) | O_NONBLOCK);
	char tmp[600];
	snprintf(tmp, sizeof(tmp), "%s.new", link_path);
	unlink(tmp);
	if (symlink(name, tmp) != 0 || rename(tmp, link_path) != 0) {
		unlink(tmp);
		close(sl);
		close(m);
		return -1;
	}
	*master = m;
	*slave = sl;
	return 0;
}

/* Garbage for the noise fault: control bytes, high bytes and punctuation,
 * never letters or digits, so a reply after it stays recognisable. */
static size_t garbage(sim_t *s, char *out, size_t n)
{
	static const char pool[] = "\x01\x02\x07\x1b\x7f\x80\x9c\xfe\xff#~%&*!?";
	for (size_t i = 0; i < n; i++)
		out[i] = pool[rng_next(s) % (sizeof(pool) - 1)];
	return n;
}

static void write_all(int fd, const char *b, size_t n)
{
	double deadline = clock_mono_s() + 1.0;
	while (n > 0 && clock_mono_s() < deadline) {
		ssize_t w = write(fd, b, n);
		if (w > 0) {
			b += w;
			n -= (size_t)w;
		} else if (w < 0 && errno != EAGAIN && errno != EINTR) {
			return;
		} else {
			struct pollfd pf = {.fd = fd, .events = POLLOUT};
			poll(&pf, 1, 10);
		}
	}
}

/* Reply with the noise fault applied: every reply gets leading garbage and
 * every fifth is lost in a line of garbage. */
static size_t frame_reply(sim_t *s, const char *reply, char *out, size_t cap)
{
	size_t o = 0;
	if (s->fault == SIM_FAULT_NOISE) {
		s->pump.replies++;
		o += garbage(s, out, 3 + rng_next(s) % 6);
		if (s->pump.replies % 5 == 0) {
			o += garbage(s, out + o, 8);
			memcpy(out + o, "\r\n", 2);
			return o + 2;
		}
	}
	int n = snprintf(out + o, cap - o, "%s\r\n", reply);
	return n > 0 ? o + (size_t)n : o;
}

typedef bool (*line_fn)(sim_t *s, int unit, const char *line, char *reply, size_t cap);

static bool pump_line(sim_t *s, int unit, const char *line, char *reply, size_t cap)
{
	(void)unit;
	return sim_pump_command(s, line, reply, cap);
}

static bool changer_line(sim_t *s, int unit, const char *line, char *reply, size_t cap)
{
	(void)unit;
	return sim_changer_command(s, line, reply, cap);
}

/* Serve one device on a pty at `link`: a command a line (LF; CR ignored), a
 * reply line each (CR LF); the pty goes away while the unplug fault lasts. */
static void serve_pty(sim_t *s, const char *link, const char *what, line_fn cmd, int unit,
                      bool noisy)
{
	int master = -1, slave = -1;
	char line[256];
	size_t len = 0;
	while (!atomic_load(&s->stop)) {
		pthread_mutex_lock(&s->mu);
		sim_tick(s, clock_mono_s());
		bool unplugged = s->fault == SIM_FAULT_UNPLUG;
		pthread_mutex_unlock(&s->mu);
		if (unplugged && master >= 0) {
			unlink(link);
			close(master);
			close(slave);
			master = slave = -1;
			len = 0;
		}
		if (!unplugged && master < 0 && sim_pty_open(link, &master, &slave) != 0) {
			fprintf(stderr, "stopcock-sim: cannot create the %s pty: %s\n", what,
			        strerror(errno));
			master = -1;
		}
		if (master < 0) {
			struct timespec ts = {0, 10000000L};
			nanosleep(&ts, NULL);
			continue;
		}
		struct pollfd pf = {.fd = master, .events = POLLIN};
		if (poll(&pf, 1, 10) <= 0 || !(pf.revents & POLLIN))
			continue;
		char buf[256];
		ssize_t r = read(master, buf, sizeof(buf));
		if (r <= 0)
			continue;
		for (ssize_t i = 0; i < r; i++) {
			char c = buf[i];
			if (c == '\r')
				continue;
			if (c != '\n') {
				if (len < sizeof(line) - 1)
					line[len++] = c;
				continue;
			}
			line[len] = '\0';
			len = 0;
			char reply[128], out[300];
			size_t n = 0;
			pthread_mutex_lock(&s->mu);
			sim_tick(s, clock_mono_s());
			if (cmd(s, unit, line, reply, sizeof(reply))) {
				if (noisy) {
					n = frame_reply(s, reply, out, sizeof(out));
				} else {
					int k = snprintf(out, sizeof(out), "%s\r\n", reply);
					n = k > 0 ? (size_t)k : 0;
				}
			}
			pthread_mutex_unlock(&s->mu);
			if (n)
				write_all(master, out, n);
		}
	}
	if (master >= 0) {
		unlink(link);
		close(master);
		close(slave);
	}
}

void *sim_pump_thread(void *arg)
{
	sim_t *s = arg;
	serve_pty(s, s->pump_link, "pump", pump_line, -1, true);
	return NULL;
}

void *sim_changer_thread(void *arg)
{
	sim_t *s = arg;
	serve_pty(s, s->changer_link, "changer", changer_line, -1, false);
	return NULL;
}

static bool balance_line(sim_t *s, int unit, const char *line, char *reply, size_t cap)
{
	(void)unit;
	return sim_balance_command(s, line, reply, cap);
}

void *sim_balance_thread(void *arg)
{
	sim_t *s = arg;
	serve_pty(s, s->balance_link, "balance", balance_line, -1, false);
	return NULL;
}

void *sim_doser_thread(void *arg)
{
	sim_doser_t *d = arg;
	serve_pty(d->sim, d->link, "doser", sim_doser_command, d->index, false);
	return NULL;
}
