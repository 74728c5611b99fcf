/* sim_control.c: the simulator's control socket (a Unix stream socket; one
 * command a line, one reply line each: `ok`, `error: ...` or, for `state`,
 * one line of JSON). */
#include <errno.h>
#include <limits.h>
#include <poll.h>
#include <jansson.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/un.h>
#include <time.h>
#include <unistd.h>

#include "scenario.h"
#include "sim.h"
#include "clock.h"

static void kinds(char *out, size_t cap)
{
	out[0] = '\0';
	for (int i = 1; i < SIM_FAULT_COUNT; i++) {
		size_t l = strlen(out);
		snprintf(out + l, cap - l, "%s%s", i > 1 ? ", " : "",
		         sim_fault_name((sim_fault_t)i));
	}
}

static json_t *real_or_null(double v)
{
	return isfinite(v) ? json_real(v) : json_null();
}

void sim_control_command(sim_t *s, const char *line, char *reply, size_t cap)
{
	while (*line == ' ')
		line++;
	char word[32] = "";
	const char *rest = line;
	size_t wl = strcspn(line, " ");
	if (wl < sizeof(word)) {
		memcpy(word, line, wl);
		word[wl] = '\0';
	}
	rest = line + wl;
	while (*rest == ' ')
		rest++;
	if (!strcmp(word, "state")) {
		pthread_mutex_lock(&s->mu);
		sim_tick(s, clock_mono_s());
		const char *f = sim_fault_name(s->fault);
		double ml_per_step = s->pump.capacity_ml / (double)s->pump.steps;
		/* jansson writes the reply: a number that is not finite (a beaker
		 * model gone wrong) is null, never text that is not JSON. */
		json_t *o = json_object();
		/* With a changer and the head up there is no beaker: its numbers
		 * are null, and the probe reads air. */
		const beaker_t *b = s->beaker;
		json_object_set_new(o, "dispensed_ml",
		                    b ? real_or_null(beaker_titrant_ml(b)) : json_null());
		json_object_set_new(o, "ph", b ? real_or_null(beaker_true_ph(b)) : json_null());
		json_object_set_new(o, "mv", real_or_null(s->mv));
		json_object_set_new(o, "temperature_c",
		                    b ? real_or_null(beaker_temperature_c(b)) : json_null());
		json_object_set_new(o, "moving", json_boolean(s->pump.moving));
		json_object_set_new(o, "fault", f ? json_string(f) : json_null());
		json_object_set_new(o, "contents_ml",
		                    real_or_null((double)s->pump.pos * ml_per_step));
		json_object_set_new(o, "valve", json_string(s->pump.valve_in ? "in" : "out"));
		json_object_set_new(o, "stirrer", json_boolean(s->stir_on));
		json_object_set_new(o, "stirrer_rpm", json_integer((json_int_t)s->stir_rpm));
		if (s->changer.present) {
			const sim_changer_t *c = &s->changer;
			static const char *const lifts[] = {"up", "down", "between"};
			json_object_set_new(o, "position", json_integer((json_int_t)c->pos));
			json_object_set_new(o, "lift", json_string(lifts[c->lift]));
			json_object_set_new(o, "changer_moving",
			                    json_boolean(c->move_left_s > 0 || c->lift_left_s > 0 ||
			                                 c->pump_left_s > 0));
			json_object_set_new(o, "spilled_ml", real_or_null(c->spilled_ml));
			json_object_set_new(o, "carried_ml", real_or_null(c->carried_ml));
		}
		if (s->n_dosers > 0) {
			json_t *ds = json_object();
			for (int i = 0; i < s->n_dosers; i++) {
				const sim_doser_t *d = &s->dosers[i];
				double per = d->pump.capacity_ml / (double)d->pump.steps;
				json_object_set_new(
				    ds, d->name,
				    json_pack("{s:o,s:o,s:b}", "dispensed_ml",
				              real_or_null(d->dispensed_ml), "contents_ml",
				              real_or_null((double)d->pump.pos * per), "moving",
				              d->pump.moving));
			}
			json_object_set_new(o, "dosers", ds);
		}
		char *text = json_dumps(o, JSON_COMPACT | JSON_REAL_PRECISION(10));
		snprintf(reply, cap, "%s", text ? text : "error: out of memory");
		free(text);
		json_decref(o);
		pthread_mutex_unlock(&s->mu);
	} else if (!strcmp(word, "lift") && !strcmp(rest, "up")) {
		/* Someone raises the head by hand (a test of the head-up interlock):
		 * at once, whatever the changer was doing. */
		pthread_mutex_lock(&s->mu);
		if (!s->changer.present) {
			snprintf(reply, cap, "error: lift needs a rack (--rack)");
		} else {
			s->changer.lift = 0;
			s->changer.lift_left_s = 0;
			s->beaker = NULL;
			snprintf(reply, cap, "ok");
		}
		pthread_mutex_unlock(&s->mu);
	} else if (!strcmp(word, "clear") && !*rest) {
		pthread_mutex_lock(&s->mu);
		s->fault = SIM_FAULT_NONE;
		s->fault_until_s = 0;
		/* A transmitter that thaws measures at once: the next tick gives a
		 * new count, so a reader is not left with the frozen one. */
		s->next_measure_s = 0;
		pthread_mutex_unlock(&s->mu);
		snprintf(reply, cap, "ok");
	} else if (!strcmp(word, "fault")) {
		char kind[32] = "", extra[32] = "";
		double secs = 0;
		int n = sscanf(rest, "%31s %lf %31s", kind, &secs, extra);
		sim_fault_t f = n >= 1 ? sim_fault_parse(kind) : SIM_FAULT_COUNT;
		char k[200];
		kinds(k, sizeof(k));
		if (n < 1) {
			snprintf(reply, cap, "error: fault needs a kind (%s)", k);
		} else if (f == SIM_FAULT_COUNT) {
			snprintf(reply, cap, "error: unknown fault '%s' (kinds: %s)", kind, k);
		} else if (n == 3 || (n == 2 && !(secs > 0 && secs < 1e6)) ||
		           (n == 1 && strchr(rest, ' '))) {
			snprintf(reply, cap,
			         "error: fault %s [SECONDS]: SECONDS must be a number > 0", kind);
		} else {
			sim_set_fault(s, f, n == 2 ? secs : 0);
			snprintf(reply, cap, "ok");
		}
	} else if (!strcmp(word, "load")) {
		if (!*rest) {
			snprintf(reply, cap, "error: load needs a scenario file");
			return;
		}
		chem_scenario_t sc;
		diag_list_t d = DIAG_LIST_INIT;
		if (scenario_load(rest, &sc, &d) != 0) {
			char *j = diag_join(&d);
			/* one reply line: errors joined by "; " */
			for (char *p = j; p && *p; p++)
				if (*p == '\n')
					*p = ';';
			snprintf(reply, cap, "error: %s", j ? j : "cannot load scenario");
			free(j);
			diag_free(&d);
			return;
		}
		diag_free(&d);
		pthread_mutex_lock(&s->mu);
		if (s->beaker) {
			s->scen = sc;
			beaker_load(s->beaker, &sc);
			snprintf(reply, cap, "ok");
		} else {
			/* with a changer: the beaker under the lowered head */
			snprintf(reply, cap,
			         "error: load: no beaker under the head (lower it first)");
		}
		pthread_mutex_unlock(&s->mu);
	} else {
		snprintf(reply, cap,
		         "error: unknown command '%s' (load, fault, clear, state, lift up)", word);
	}
}

int sim_control_bind(const char *path)
{
	struct sockaddr_un a;
	memset(&a, 0, sizeof(a));
	a.sun_family = AF_UNIX;
	if (strlen(path) >= sizeof(a.sun_path)) {
		errno = ENAMETOOLONG;
		return -1;
	}
	strcpy(a.sun_path, path);
	int fd = socket(AF_UNIX, SOCK_STREAM | SOCK_CLOEXEC, 0);
	if (fd < 0)
		return -1;
	unlink(path);
	if (bind(fd, (struct sockaddr *)&a, sizeof(a)) != 0 || listen(fd, 4) != 0) {
		int e = errno;
		close(fd);
		errno = e;
		return -1;
	}
	return fd;
}

#define MAX_CTL 4

typedef struct ctl_client {
	int fd;
	char buf[1024];
	size_t len;
} ctl_client_t;

static void send_line(int fd, const char *s)
{
	char out[2100];
	int n = snprintf(out, sizeof(out), "%s\n", s);
	if (n > 0)
		(void)send(fd, out, (size_t)n, MSG_NOSIGNAL);
}

void *sim_control_thread(void *arg)
{
	sim_control_arg_t *ca = arg;
	sim_t *s = ca->sim;
	ctl_client_t cl[MAX_CTL];
	int nc = 0;
	while (!atomic_load(&s->stop)) {
		struct pollfd pf[MAX_CTL + 1];
		pf[0].fd = ca->listen_fd;
		pf[0].events = POLLIN;
		for (int i = 0; i < nc; i++) {
			pf[i + 1].fd = cl[i].fd;
			pf[i + 1].events = POLLIN;
		}
		if (poll(pf, (nfds_t)nc + 1, 100) <= 0)
			continue;
		for (int i = nc - 1; i >= 0; i--) {
			if (!(pf[i + 1].revents & (POLLIN | POLLHUP | POLLERR)))
				continue;
			ctl_client_t *c = &cl[i];
			ssize_t r = recv(c->fd, c->buf + c->len, sizeof(c->buf) - 1 - c->len, 0);
			if (r <= 0) {
				close(c->fd);
				cl[i] = cl[--nc];
				continue;
			}
			c->len += (size_t)r;
			char *nl;
			while ((nl = memchr(c->buf, '\n', c->len))) {
				*nl = '\0';
				if (nl > c->buf && nl[-1] == '\r')
					nl[-1] = '\0';
				char reply[2048];
				sim_control_command(s, c->buf, reply, sizeof(reply));
				send_line(c->fd, reply);
				size_t used = (size_t)(nl - c->buf) + 1;
				memmove(c->buf, c->buf + used, c->len - used);
				c->len -= used;
			}
			if (c->len == sizeof(c->buf) - 1) {
				send_line(c->fd, "error: line too long");
				c->len = 0;
			}
		}
		/* accept last: pf[] covers only the clients polled above */
		if (pf[0].revents & POLLIN) {
			int c = accept4(ca->listen_fd, NULL, NULL, SOCK_CLOEXEC);
			if (c >= 0 && nc < MAX_CTL) {
				cl[nc].fd = c;
				cl[nc].len = 0;
				nc++;
			} else if (c >= 0) {
				send_line(c, "error: too many control connections");
				close(c);
			}
		}
	}
	for (int i = 0; i < nc; i++)
		close(cl[i].fd);
	return NULL;
}

/* `stopcock-sim control SOCKET COMMAND...`: the words joined by spaces are
 * one command line; the reply line goes to standard output. A relative
 * scenario path of `load` is made absolute first: the simulator resolves it
 * against its own folder, which need not be the caller's. */
int sim_control_client(int argc, char **argv)
{
	char line[1024 + 8] = "", reply[2048];
	size_t len = 0, got = 0;
	struct sockaddr_un a;
	int fd;

	if (argc < 2) {
		fprintf(
		    stderr,
		    "usage: stopcock-sim control SOCKET COMMAND [ARG...]\n"
		    "  commands: load S.yaml | fault KIND [SECONDS] | clear | state | lift up\n");
		return 2;
	}
	for (int i = 1; i < argc; i++) {
		char abs[PATH_MAX];
		const char *w = argv[i];
		if (i == 2 && !strcmp(argv[1], "load") && w[0] != '/') {
			if (!realpath(w, abs)) {
				fprintf(stderr, "stopcock-sim control: %s: %s\n", w,
				        strerror(errno));
				return 2;
			}
			w = abs;
		}
		int n = snprintf(line + len, sizeof line - len, "%s%s", i > 1 ? " " : "", w);
		if (n < 0 || (size_t)n >= sizeof line - len - 1) {
			fprintf(stderr, "stopcock-sim control: the command is too long\n");
			return 2;
		}
		len += (size_t)n;
	}
	line[len++] = '\n';
	memset(&a, 0, sizeof a);
	a.sun_family = AF_UNIX;
	if (strlen(argv[0]) >= sizeof a.sun_path) {
		fprintf(stderr, "stopcock-sim control: socket path too long: %s\n", argv[0]);
		return 2;
	}
	strcpy(a.sun_path, argv[0]);
	fd = socket(AF_UNIX, SOCK_STREAM | SOCK_CLOEXEC, 0);
	if (fd < 0 || connect(fd, (struct sockaddr *)&a, sizeof a) != 0) {
		fprintf(stderr, "stopcock-sim control: cannot connect to %s: %s\n", argv[0],
		        strerror(errno));
		if (fd >= 0)
			close(fd);
		return 1;
	}
	if (send(fd, line, len, MSG_NOSIGNAL) != (ssize_t)len) {
		fprintf(stderr, "stopcock-sim control: %s: %s\n", argv[0], strerror(errno));
		close(fd);
		return 1;
	}
	/* One reply line; the simulator answers at once (10 s is far beyond it). */
	struct pollfd pf = {.fd = fd, .events = POLLIN};
	while (got < sizeof reply - 1 && !memchr(reply, '\n', got)) {
		ssize_t r;
		if (poll(&pf, 1, 10000) <= 0)
			break;
		r = recv(fd, reply + got, sizeof reply - 1 - got, 0);
		if (r <= 0)
			break;
		got += (size_t)r;
	}
	close(fd);
	reply[got] = '\0';
	reply[strcspn(reply, "\n")] = '\0';
	if (!got) {
		fprintf(stderr, "stopcock-sim control: no reply from %s\n", argv[0]);
		return 1;
	}
	if (!strncmp(reply, "error:", 6)) {
		fprintf(stderr, "stopcock-sim control: %s\n", reply + 7);
		return 1;
	}
	printf("%s\n", reply);
	return 0;
}

void sim_set_fault(sim_t *s, sim_fault_t f, double for_s)
{
	pthread_mutex_lock(&s->mu);
	s->fault = f;
	s->fault_until_s = for_s > 0 ? clock_mono_s() + for_s : 0;
	pthread_mutex_unlock(&s->mu);
}
