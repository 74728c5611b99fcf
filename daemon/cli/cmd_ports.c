/* cmd_ports.c: `stopcock ports`: list serial ports with their USB
 * descriptions (libserialport), to fill in a station's config; and
 * `stopcock ports --test CONFIG [--station NAME]`: talk to the devices a
 * config names, one command a line on stdin, one JSON line each on stdout,
 * to check wiring before the daemon runs (docs/drivers.md). */
#include <dirent.h>
#include <limits.h>
#include <jansson.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include <libserialport.h>

#include "cmd.h"
#include "config.h"
#include "drv.h"
#include "yamltree.h"
#include "clock.h"

/* The stable name of a port under /dev/serial/by-id (it survives reboots
 * and replugging, unlike ttyUSB numbers), or "" when there is none. */
static void by_id(const char *port, char *out, size_t cap)
{
	out[0] = '\0';
	DIR *d = opendir("/dev/serial/by-id");
	if (!d)
		return;
	char want[PATH_MAX];
	if (!realpath(port, want)) {
		closedir(d);
		return;
	}
	struct dirent *e;
	while ((e = readdir(d))) {
		if (e->d_name[0] == '.')
			continue;
		char link[PATH_MAX], real[PATH_MAX];
		int n = snprintf(link, sizeof(link), "/dev/serial/by-id/%s", e->d_name);
		if (n > 0 && (size_t)n < sizeof(link) && realpath(link, real) &&
		    !strcmp(real, want)) {
			snprintf(out, cap, "%s", link);
			break;
		}
	}
	closedir(d);
}

static int list_ports(void)
{
	struct sp_port **ports = NULL;
	if (sp_list_ports(&ports) != SP_OK) {
		char *m = sp_last_error_message();
		fprintf(stderr, "stopcock ports: cannot list serial ports: %s\n", m ? m : "?");
		sp_free_error_message(m);
		return 1;
	}
	int n = 0;
	for (; ports[n]; n++) {
		struct sp_port *p = ports[n];
		const char *desc = sp_get_port_description(p);
		printf("%s", sp_get_port_name(p));
		if (sp_get_port_transport(p) == SP_TRANSPORT_USB) {
			int vid = 0, pid = 0;
			sp_get_port_usb_vid_pid(p, &vid, &pid);
			const char *man = sp_get_port_usb_manufacturer(p);
			const char *prod = sp_get_port_usb_product(p);
			const char *ser = sp_get_port_usb_serial(p);
			printf("  usb %04x:%04x", vid, pid);
			if (man)
				printf("  %s", man);
			if (prod)
				printf("  %s", prod);
			if (ser)
				printf("  serial %s", ser);
		} else if (desc) {
			printf("  %s", desc);
		}
		char stable[PATH_MAX];
		by_id(sp_get_port_name(p), stable, sizeof(stable));
		if (stable[0])
			printf("\n    stable name: %s", stable);
		printf("\n");
	}
	sp_free_port_list(ports);
	if (n == 0)
		printf("no serial ports found (USB adapters appear as /dev/ttyUSB* or "
		       "/dev/ttyACM* once plugged in; pseudo-terminals are never listed)\n");
	return 0;
}

/* A dosing unit: a burette driver of its own, under the station's `dosers:`. */
typedef struct doser {
	char name[CFG_NAME_MAX];
	drv_burette_t bur;
} doser_t;

typedef struct bench {
	drv_burette_t bur;
	drv_probe_t probe;
	drv_stirrer_t stir;
	drv_changer_t changer;
	drv_balance_t balance;
	bool has_bur, has_probe, has_stir, has_changer, has_balance;
	doser_t dosers[CFG_MAX_DOSERS];
	int n_dosers;
} bench_t;

/* Every reply is one JSON object on one line, written by jansson: text in
 * UTF-8 as it is, and a number that is not finite as null. */
static json_t *num(double x, double scale)
{
	return isfinite(x) ? json_real(round(x * scale) / scale) : json_null();
}

static json_t *head(const char *cmd, drv_status_t st, double t0, const drv_err_t *e)
{
	json_t *o = json_object();
	json_object_set_new(o, "cmd", json_string(cmd));
	json_object_set_new(o, "status", json_string(drv_status_name(st)));
	json_object_set_new(o, "ms", num((clock_mono_s() - t0) * 1000, 10));
	if (st != DRV_OK)
		json_object_set_new(o, "error", json_string(e->msg));
	return o;
}

static void emit(json_t *o)
{
	char *text = o ? json_dumps(o, JSON_COMPACT | JSON_PRESERVE_ORDER) : NULL;
	puts(text ? text : "{\"status\":\"internal\",\"error\":\"out of memory\"}");
	free(text);
	json_decref(o);
	fflush(stdout);
}

static void print_burette(json_t *o, const drv_burette_status_t *b)
{
	json_object_set_new(o, "moving", json_boolean(b->moving));
	json_object_set_new(o, "refilling", json_boolean(b->refilling));
	json_object_set_new(o, "dispensed_ml", num(b->dispensed_ml, 1e6));
	json_object_set_new(o, "contents_ml", num(b->contents_ml, 1e6));
	json_object_set_new(o, "fault", json_boolean(b->fault));
}

static void print_changer(json_t *o, const drv_changer_status_t *c)
{
	json_object_set_new(o, "position", json_integer(c->position));
	json_object_set_new(o, "lift", json_string(drv_lift_name(c->lift)));
	json_object_set_new(o, "moving", json_boolean(c->moving));
	json_object_set_new(o, "fault", json_boolean(c->fault));
}

static void sleep_s(double s)
{
	struct timespec ts = {(time_t)s, (long)((s - floor(s)) * 1e9)};
	nanosleep(&ts, NULL);
}

/* The changer's commands but its status; DRV_OK for changer-status and
 * changer-wait, which run_command answers. */
static drv_status_t changer_command(bench_t *b, const char *line, const char *word, drv_err_t *e)
{
	char a[16] = "";
	double x = NAN;
	bool has_num = sscanf(line, "%*s %lf", &x) == 1;
	if (!strcmp(word, "changer-status") || !strcmp(word, "changer-wait"))
		return DRV_OK;
	if (!strcmp(word, "changer-move"))
		return has_num && x == floor(x) && fabs(x) < 1e6
		           ? drv_changer_move(&b->changer, (long)x, e)
		           : drv_fail(e, DRV_CONFIG, "changer-move needs a whole position number");
	if (!strcmp(word, "changer-lift")) {
		if (sscanf(line, "%*s %15s", a) != 1 || (strcmp(a, "up") && strcmp(a, "down")))
			return drv_fail(e, DRV_CONFIG, "changer-lift up | changer-lift down");
		return drv_changer_lift(&b->changer, !strcmp(a, "down"), e);
	}
	if (!strcmp(word, "changer-rinse") || !strcmp(word, "changer-waste"))
		return has_num ? drv_changer_pump(
		                     &b->changer,
		                     word[8] == 'r' ? DRV_CHANGER_RINSE : DRV_CHANGER_WASTE, x, e)
		               : drv_fail(e, DRV_CONFIG, "%s needs seconds", word);
	if (!strcmp(word, "changer-halt"))
		return drv_changer_halt(&b->changer, e);
	return drv_fail(
	    e, DRV_CONFIG,
	    "unknown changer command (changer-status, changer-wait [S], changer-move N, "
	    "changer-lift up|down, changer-rinse S, changer-waste S, changer-halt)");
}

static void run_command(bench_t *b, char *line)
{
	char word[32] = "";
	double arg = NAN;
	char extra[32] = "";
	int n = sscanf(line, "%31s %lf", word, &arg);
	if (n < 1)
		return;
	drv_err_t e = {""};
	drv_status_t st = DRV_OK;
	double t0 = clock_mono_s();
	json_t *o = NULL;
	/* doser-status NAME, doser-dose NAME ML, ...: the burette's commands on
	 * a dosing unit's own driver */
	drv_burette_t *bur = &b->bur;
	bool has_bur = b->has_bur;
	const char *w = word; /* the burette command */
	char doser[CFG_NAME_MAX] = "";
	if (!strncmp(word, "doser-", 6)) {
		w = word + 6;
		n = sscanf(line, "%*s %31s %lf", doser, &arg);
		has_bur = false;
		for (int i = 0; i < b->n_dosers; i++)
			if (!strcmp(b->dosers[i].name, doser)) {
				bur = &b->dosers[i].bur;
				has_bur = true;
			}
		if (!has_bur || (strcmp(w, "status") && strcmp(w, "dose") && strcmp(w, "halt") &&
		                 strcmp(w, "refill") && strcmp(w, "wait"))) {
			st = has_bur
			         ? drv_fail(&e, DRV_CONFIG,
			                    "unknown doser command (doser-status NAME, doser-wait "
			                    "NAME [S], doser-dose NAME ML, doser-refill NAME, "
			                    "doser-halt NAME)")
			         : drv_fail(&e, DRV_CONFIG, "this station has no doser named '%s'",
			                    doser);
			o = head(word, st, t0, &e);
			json_object_set_new(o, "doser", json_string(doser));
			emit(o);
			return;
		}
	}
	bool need_bur = !strcmp(w, "status") || !strcmp(w, "dose") || !strcmp(w, "halt") ||
	                !strcmp(w, "refill") || !strcmp(w, "wait");
	bool need_changer = !strncmp(word, "changer", 7);
	if ((need_bur && !has_bur) || (!strcmp(word, "read") && !b->has_probe) ||
	    (!strcmp(word, "stir") && !b->has_stir) || (need_changer && !b->has_changer) ||
	    (!strcmp(word, "balance-weigh") && !b->has_balance)) {
		st = drv_fail(&e, DRV_CONFIG, "this station has no such device");
		emit(head(word, st, t0, &e));
		return;
	}
	if (!strcmp(word, "read")) {
		drv_reading_t r;
		st = drv_probe_read(&b->probe, &r, &e);
		o = head(word, st, t0, &e);
		if (st == DRV_OK) {
			json_object_set_new(o, "mv", num(r.mv, 1e3));
			if (r.has_ph)
				json_object_set_new(o, "ph", num(r.ph, 1e4));
			if (r.has_temperature)
				json_object_set_new(o, "temperature_c", num(r.temperature_c, 1e2));
		}
	} else if (!strcmp(w, "status") || !strcmp(w, "wait")) {
		drv_burette_status_t bs;
		double limit = (!strcmp(w, "wait") && n == 2) ? arg : 0;
		for (;;) {
			st = drv_burette_status(bur, &bs, &e);
			if (st != DRV_OK || !bs.moving || clock_mono_s() - t0 >= limit)
				break;
			sleep_s(0.05);
		}
		o = head(word, st, t0, &e);
		if (st == DRV_OK)
			print_burette(o, &bs);
	} else if (!strcmp(w, "dose")) {
		st = n == 2 ? drv_burette_dose(bur, arg, &e)
		            : drv_fail(&e, DRV_CONFIG, "%s needs a volume in mL", word);
		o = head(word, st, t0, &e);
	} else if (!strcmp(w, "halt")) {
		st = drv_burette_halt(bur, &e);
		o = head(word, st, t0, &e);
	} else if (!strcmp(w, "refill")) {
		st = drv_burette_refill(bur, &e);
		o = head(word, st, t0, &e);
	} else if (!strcmp(word, "stir")) {
		char onoff[8] = "";
		double rpm = 0;
		int k = sscanf(line, "%*s %7s %lf", onoff, &rpm);
		if (k < 1 || (strcmp(onoff, "on") && strcmp(onoff, "off")))
			st = drv_fail(&e, DRV_CONFIG, "stir on [RPM] | stir off");
		else
			st = drv_stirrer_set(&b->stir, !strcmp(onoff, "on"), rpm, &e);
		o = head(word, st, t0, &e);
	} else if (need_changer) {
		st = changer_command(b, line, word, &e);
		o = head(word, st, t0, &e);
		if (st == DRV_OK &&
		    (!strcmp(word, "changer-status") || !strcmp(word, "changer-wait"))) {
			drv_changer_status_t cs;
			double limit = !strcmp(word, "changer-wait") && n == 2 ? arg : 0;
			for (;;) {
				st = drv_changer_status(&b->changer, &cs, &e);
				if (st != DRV_OK || !cs.moving || clock_mono_s() - t0 >= limit)
					break;
				sleep_s(0.05);
			}
			json_decref(o);
			o = head(word, st, t0, &e);
			if (st == DRV_OK)
				print_changer(o, &cs);
			else if (cs.fault) /* the device's own error: a jam, a stuck lift */
				json_object_set_new(o, "fault", json_true());
		}
	} else if (!strcmp(word, "balance-weigh")) {
		drv_weight_t wt;
		st = drv_balance_weigh(&b->balance, &wt, &e);
		o = head(word, st, t0, &e);
		if (st == DRV_OK) {
			json_object_set_new(o, "value", json_real(wt.value));
			json_object_set_new(o, "unit", json_string(wt.unit));
		}
	} else if (!strcmp(word, "sleep")) {
		if (n == 2 && arg > 0 && arg < 3600)
			sleep_s(arg);
		o = head(word, st, t0, &e);
	} else {
		snprintf(extra, sizeof(extra), "%s", word);
		st = drv_fail(
		    &e, DRV_CONFIG,
		    "unknown command (read, status, dose ML, wait [S], refill, halt, "
		    "stir on [RPM], stir off, changer-status, changer-wait [S], "
		    "changer-move N, changer-lift up|down, changer-rinse S, "
		    "changer-waste S, changer-halt, doser-status NAME, doser-wait NAME [S], "
		    "doser-dose NAME ML, doser-refill NAME, doser-halt NAME, balance-weigh, sleep "
		    "S)");
		o = head(extra, st, t0, &e);
	}
	if (doser[0])
		json_object_set_new(o, "doser", json_string(doser));
	emit(o);
}

static const yt_node_t *find_station(const yt_doc_t *doc, const char *name, diag_list_t *d)
{
	const yt_node_t *st = yt_get(doc->root, "stations");
	if (!st || !yt_want_seq(doc, st, "stations", d))
		return NULL;
	for (size_t i = 0; i < st->n; i++) {
		const yt_node_t *s = st->items[i];
		const yt_node_t *nm = yt_get(s, "name");
		if (!name || (nm && nm->kind == YT_SCALAR && !strcmp(nm->str, name)))
			return s;
	}
	diag_add(d, doc->file, st->line, st->col, "no station named '%s'", name ? name : "");
	return NULL;
}

static int test_devices(const char *path, const char *station)
{
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	diag_list_t d = DIAG_LIST_INIT;
	bench_t b;
	memset(&b, 0, sizeof(b));
	int rc = 2;
	const yt_node_t *s;
	if (yt_load_file(path, &doc, &d) != 0 || !(s = find_station(&doc, station, &d)))
		goto out;
	const yt_node_t *n;
	if ((n = yt_get(s, "burette")))
		b.has_bur = drv_burette_configure(&doc, n, &b.bur, &d) == 0;
	if ((n = yt_get(s, "probe")))
		b.has_probe = drv_probe_configure(&doc, n, &b.probe, &d) == 0;
	if ((n = yt_get(s, "stirrer")))
		b.has_stir = drv_stirrer_configure(&doc, n, &b.stir, &d) == 0;
	if ((n = yt_get(s, "changer")))
		b.has_changer = drv_changer_configure(&doc, n, &b.changer, &d) == 0;
	if ((n = yt_get(s, "dosers")) && !yt_is_null(n) && yt_want_map(&doc, n, "dosers", &d))
		for (size_t i = 0; i < n->n && b.n_dosers < CFG_MAX_DOSERS; i++) {
			const yt_node_t *u = n->items[i];
			const yt_node_t *dn = u->kind == YT_MAP ? yt_get(u, "burette") : NULL;
			doser_t *o = &b.dosers[b.n_dosers];
			if (!dn) {
				yt_error(&doc, n->keys[i], &d, "doser '%s' needs a burette",
				         n->keys[i]->str);
			} else if (drv_burette_configure(&doc, dn, &o->bur, &d) == 0) {
				snprintf(o->name, sizeof o->name, "%s", n->keys[i]->str);
				b.n_dosers++;
			}
		}
	if ((n = yt_get(s, "balance")))
		b.has_balance = drv_balance_configure(&doc, n, &b.balance, &d) == 0;
	if (d.n)
		goto out;
	rc = 0;
	/* Open each device; report, but go on: commands reopen by themselves. */
	drv_err_t e;
	double t0 = clock_mono_s();
	if (b.has_bur) {
		drv_status_t st = drv_burette_open(&b.bur, &e);
		json_t *o = head("open burette", st, t0, &e);
		if (st == DRV_OK) {
			drv_burette_info_t info;
			drv_burette_info(&b.bur, &info);
			json_object_set_new(o, "capacity_ml", num(info.capacity_ml, 1e4));
			json_object_set_new(o, "steps", json_integer(info.steps));
		}
		emit(o);
	}
	if (b.has_probe) {
		t0 = clock_mono_s();
		drv_status_t st = drv_probe_open(&b.probe, &e);
		emit(head("open probe", st, t0, &e));
	}
	if (b.has_stir) {
		t0 = clock_mono_s();
		drv_status_t st = drv_stirrer_open(&b.stir, &e);
		emit(head("open stirrer", st, t0, &e));
	}
	if (b.has_changer) {
		t0 = clock_mono_s();
		drv_status_t st = drv_changer_open(&b.changer, &e);
		json_t *o = head("open changer", st, t0, &e);
		if (st == DRV_OK) {
			drv_changer_info_t info;
			drv_changer_info(&b.changer, &info);
			json_object_set_new(o, "positions", json_integer(info.positions));
		}
		emit(o);
	}
	for (int i = 0; i < b.n_dosers; i++) {
		char what[CFG_NAME_MAX + 16];
		t0 = clock_mono_s();
		drv_status_t st = drv_burette_open(&b.dosers[i].bur, &e);
		snprintf(what, sizeof what, "open doser %s", b.dosers[i].name);
		json_t *o = head(what, st, t0, &e);
		if (st == DRV_OK) {
			drv_burette_info_t info;
			drv_burette_info(&b.dosers[i].bur, &info);
			json_object_set_new(o, "capacity_ml", num(info.capacity_ml, 1e4));
		}
		emit(o);
	}
	if (b.has_balance) {
		t0 = clock_mono_s();
		emit(head("open balance", drv_balance_open(&b.balance, &e), t0, &e));
	}
	fflush(stdout);
	char line[256];
	while (fgets(line, sizeof(line), stdin)) {
		line[strcspn(line, "\r\n")] = '\0';
		if (!strcmp(line, "quit"))
			break;
		run_command(&b, line);
	}
out:
	diag_sort(&d);
	diag_print(&d, stderr);
	diag_free(&d);
	drv_burette_close(&b.bur);
	drv_probe_close(&b.probe);
	drv_stirrer_close(&b.stir);
	drv_changer_close(&b.changer);
	for (int i = 0; i < b.n_dosers; i++)
		drv_burette_close(&b.dosers[i].bur);
	drv_balance_close(&b.balance);
	yt_free(&doc);
	return rc;
}

int cmd_ports(int argc, char **argv)
{
	const char *test = NULL, *station = NULL;
	for (int i = 1; i < argc; i++) {
		if (!strcmp(argv[i], "--test") && i + 1 < argc) {
			test = argv[++i];
		} else if (!strcmp(argv[i], "--station") && i + 1 < argc) {
			station = argv[++i];
		} else if (!strcmp(argv[i], "-h") || !strcmp(argv[i], "--help")) {
			printf(
			    "usage: stopcock ports                 list serial ports\n"
			    "       stopcock ports --test CONFIG [--station NAME]\n"
			    "           talk to a station's devices: commands on stdin (read, "
			    "status,\n           dose ML, wait [S], refill, halt, stir on [RPM], "
			    "stir off,\n           changer-move N, changer-lift up|down, "
			    "changer-status, ...,\n           doser-status NAME, doser-dose NAME "
			    "ML, "
			    "doser-halt NAME, ..., balance-weigh,\n           sleep S), one JSON "
			    "line each on "
			    "stdout\n");
			return 0;
		} else {
			fprintf(stderr, "stopcock ports: unknown argument '%s' (try --help)\n",
			        argv[i]);
			return 2;
		}
	}
	if (test)
		return test_devices(test, station);
	if (station) {
		fprintf(stderr, "stopcock ports: --station goes with --test CONFIG\n");
		return 2;
	}
	return list_ports();
}
