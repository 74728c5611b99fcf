/* stopcock_sim.c: `stopcock-sim`, the simulated bench (docs/api.md).
 *
 * A burette on a pseudo-terminal (config/pumps/sim.yaml's protocol), a pH/mV
 * transmitter and stirrer on Modbus TCP (and RTU on a second pty with
 * --rtu-link), backed by the beaker model; with --rack a sample changer on
 * its own pty (config/changers/sim.yaml's protocol) over a rack of beakers;
 * a control socket to change the sample and inject faults. Prints `ready` when every link answers;
 * SIGTERM or SIGINT ends it cleanly with status 0. */
#include <errno.h>
#include <fcntl.h>
#include <getopt.h>
#include <limits.h>
#include <pthread.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include <modbus.h>

#include "datadir.h"
#include "numparse.h"
#include "serial.h"
#include "scenario.h"
#include "sim.h"
#include "clock.h"

typedef struct opts {
	const char *scenario, *tcp, *pump_link, *rtu_link, *control, *config_out, *state_dir;
	const char *rack, *changer_link;
	const char *listen;
	unsigned long long seed;
	double balance_g; /* --balance-weight: the weight on the pan, g; 0: none */
} opts_t;

static void usage(FILE *f)
{
	fprintf(
	    f, "usage: stopcock-sim --scenario S.yaml --modbus-tcp HOST:PORT --pump-link PATH\n"
	       "                    [--rtu-link PATH] [--control SOCKET] [--seed N]\n"
	       "                    [--config-out FILE --state-dir DIR [--listen ADDR:PORT]]\n"
	       "       stopcock-sim --rack RACK.yaml [--changer-link PATH] --modbus-tcp HOST:PORT\n"
	       "                    --pump-link PATH [the options above but --scenario]\n"
	       "       stopcock-sim control SOCKET COMMAND [ARG...]\n"
	       "\n"
	       "options:\n"
	       "      --scenario FILE     beaker scenario (YAML): sample, titrant, electrode\n"
	       "      --rack FILE         a rack of beakers (YAML) on a simulated sample changer\n"
	       "      --changer-link PATH symlink created to the changer's pseudo-terminal\n"
	       "                          (default: the pump link with \".changer\" added)\n"
	       "      --balance-weight G  a balance on its own pty (the pump link with\n"
	       "                          \".balance\" added) weighing G grams; a rack file's\n"
	       "                          weights: put one on the bench too\n"
	       "      --modbus-tcp H:P    address of the simulated transmitter (Modbus TCP)\n"
	       "      --pump-link PATH    symlink created to the burette's pseudo-terminal\n"
	       "      --rtu-link PATH     symlink created to a Modbus RTU pseudo-terminal\n"
	       "      --control SOCKET    Unix socket for sample changes and fault injection\n"
	       "      --seed N            seed of the electrode noise (whole number, default 1)\n"
	       "      --config-out FILE   write a stopcockd config for this bench to FILE\n"
	       "      --state-dir DIR     state folder named in that config\n"
	       "      --listen A:P        HTTP address named in that config\n"
	       "  -V, --version           print the version and exit\n"
	       "  -h, --help              print this help and exit\n"
	       "\n"
	       "exit status: 0 clean stop (SIGTERM/SIGINT), 1 runtime failure,\n"
	       "             2 bad arguments or scenario\n");
}

static int parse_args(int argc, char **argv, opts_t *o)
{
	static const struct option longopts[] = {
	    {"scenario", required_argument, NULL, 's'},
	    {"modbus-tcp", required_argument, NULL, 't'},
	    {"pump-link", required_argument, NULL, 'p'},
	    {"rtu-link", required_argument, NULL, 'r'},
	    {"control", required_argument, NULL, 'c'},
	    {"seed", required_argument, NULL, 'S'},
	    {"config-out", required_argument, NULL, 'o'},
	    {"state-dir", required_argument, NULL, 'd'},
	    {"listen", required_argument, NULL, 'l'},
	    {"rack", required_argument, NULL, 'R'},
	    {"changer-link", required_argument, NULL, 'C'},
	    {"balance-weight", required_argument, NULL, 'B'},
	    {"version", no_argument, NULL, 'V'},
	    {"help", no_argument, NULL, 'h'},
	    {NULL, 0, NULL, 0},
	};
	memset(o, 0, sizeof(*o));
	o->seed = 1;
	int ch;
	while ((ch = getopt_long(argc, argv, "Vh", longopts, NULL)) != -1) {
		switch (ch) {
		case 's':
			o->scenario = optarg;
			break;
		case 't':
			o->tcp = optarg;
			break;
		case 'p':
			o->pump_link = optarg;
			break;
		case 'r':
			o->rtu_link = optarg;
			break;
		case 'c':
			o->control = optarg;
			break;
		case 'o':
			o->config_out = optarg;
			break;
		case 'd':
			o->state_dir = optarg;
			break;
		case 'l':
			o->listen = optarg;
			break;
		case 'R':
			o->rack = optarg;
			break;
		case 'C':
			o->changer_link = optarg;
			break;
		case 'B':
			if (!parse_decimal(optarg, &o->balance_g) || !(o->balance_g > 0) ||
			    o->balance_g > 1000) {
				fprintf(stderr,
				        "stopcock-sim: --balance-weight wants grams above 0 and at "
				        "most 1000 (got %s)\n",
				        optarg);
				return -1;
			}
			break;
		case 'S': {
			long long seed;
			if (!parse_whole(optarg, 0, LLONG_MAX, &seed)) {
				fprintf(stderr,
				        "stopcock-sim: --seed wants a whole number (got %s)\n",
				        optarg);
				return -1;
			}
			o->seed = (unsigned long long)seed;
			break;
		}
		case 'V':
			printf("stopcock-sim %s\n", STOPCOCK_VERSION);
			exit(0);
		case 'h':
			usage(stdout);
			exit(0);
		default:
			return -1; /* getopt_long has named the option */
		}
	}
	if (optind < argc) {
		fprintf(stderr, "stopcock-sim: unexpected argument %s\n", argv[optind]);
		return -1;
	}
	if (o->scenario && o->rack) {
		fprintf(stderr, "stopcock-sim: give --scenario or --rack, not both\n");
		return -1;
	}
	if (o->changer_link && !o->rack) {
		fprintf(stderr, "stopcock-sim: --changer-link goes with --rack\n");
		return -1;
	}
	if (!(o->scenario || o->rack) || !o->tcp || !o->pump_link) {
		fprintf(stderr,
		        "stopcock-sim: --scenario (or --rack), --modbus-tcp and --pump-link "
		        "are required\n");
		return -1;
	}
	if (!o->config_out != !o->state_dir) {
		fprintf(stderr, "stopcock-sim: --config-out and --state-dir go together\n");
		return -1;
	}
	return 0;
}

/* Absolute form of a path whose last part may not exist yet. */
static int abs_path(const char *p, char *out, size_t cap)
{
	char dir[PATH_MAX], real[PATH_MAX];
	const char *slash = strrchr(p, '/');
	const char *base = slash ? slash + 1 : p;
	if (slash)
		snprintf(dir, sizeof(dir), "%.*s", (int)(slash - p) ? (int)(slash - p) : 1, p);
	else
		snprintf(dir, sizeof(dir), ".");
	if (!realpath(dir, real))
		return -1;
	int n = snprintf(out, cap, "%s/%s", strcmp(real, "/") ? real : "", base);
	return n > 0 && (size_t)n < cap ? 0 : -1;
}

/* Where pumps/sim.yaml and methods/ are: the data folder (datadir.h), the
 * repository's config/ when run from a build folder. */
static void find_data(char *out, size_t cap)
{
	if (datadir_find(out, cap, NULL) != 0)
		snprintf(out, cap, "%s", ".");
}

static int write_token(const char *path)
{
	unsigned char r[16];
	int fd = open("/dev/urandom", O_RDONLY | O_CLOEXEC);
	if (fd < 0 || read(fd, r, sizeof(r)) != (ssize_t)sizeof(r)) {
		if (fd >= 0)
			close(fd);
		return -1;
	}
	close(fd);
	int out = open(path, O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0600);
	if (out < 0)
		return -1;
	fchmod(out, 0600);
	char line[64] = "sim:";
	for (size_t i = 0; i < sizeof(r); i++)
		snprintf(line + 4 + 2 * i, 3, "%02x", r[i]);
	strcat(line, "\n");
	ssize_t w = write(out, line, strlen(line));
	close(out);
	return w == (ssize_t)strlen(line) ? 0 : -1;
}

static int write_config(const opts_t *o, const sim_t *s, const char *pump_abs)
{
	char data[PATH_MAX], cfg_abs[PATH_MAX], dir_abs[PATH_MAX], token[PATH_MAX + 16];
	find_data(data, sizeof(data));
	if (abs_path(o->config_out, cfg_abs, sizeof(cfg_abs)) != 0)
		return -1;
	mkdir(o->state_dir, 0755);
	if (!realpath(o->state_dir, dir_abs))
		return -1;
	snprintf(token, sizeof(token), "%.*s/token", (int)(strrchr(cfg_abs, '/') - cfg_abs),
	         cfg_abs);
	if (write_token(token) != 0)
		return -1;
	char balance[PATH_MAX * 2 + 256] = "";
	if (s->balance.present)
		snprintf(balance, sizeof(balance),
		         "    balance:\n"
		         "      driver: balance-serial\n"
		         "      port: %s\n"
		         "      timeout_ms: 500\n"
		         "      stable_timeout_ms: 5000\n"
		         "      profile: %s/balances/sim.yaml\n",
		         s->balance_link, data);
	char changer[PATH_MAX * 2 + 256] = "", places[64] = "";
	if (s->changer.rinse)
		snprintf(places, sizeof(places), "      rinse: %ld\n", s->changer.rinse);
	if (s->changer.park)
		snprintf(places + strlen(places), sizeof(places) - strlen(places),
		         "      park: %ld\n", s->changer.park);
	if (s->changer.present)
		snprintf(changer, sizeof(changer),
		         "    changer:\n"
		         "      driver: changer-serial\n"
		         "      port: %s\n"
		         "      timeout_ms: 500\n"
		         "      profile: %s/changers/sim.yaml\n"
		         "%s",
		         s->changer_link, data, places);
	/* each simulated doser: the burette's pump profile on its own pty */
	char dosers[SIM_MAX_DOSERS * (PATH_MAX * 2 + 512) + 16] = "";
	for (int i = 0; i < s->n_dosers; i++) {
		const sim_doser_t *dz = &s->dosers[i];
		size_t len = strlen(dosers);
		snprintf(
		    dosers + len, sizeof(dosers) - len,
		    "%s      %s:\n"
		    "        reagent: %s %.6g mol/L\n"
		    "        molarity: %.6g\n"
		    "        burette: {driver: pump-serial, port: %s, baud: 9600, parity: none, "
		    "stop_bits: 1, timeout_ms: 500, profile: %s/pumps/sim.yaml, capacity_ml: "
		    "%.6g, steps: %ld}\n",
		    i == 0 ? "    dosers:\n" : "", dz->name, dz->reagent.name, dz->reagent.molar,
		    dz->reagent.molar, dz->link, data, dz->pump.capacity_ml, dz->pump.steps);
	}
	FILE *f = fopen(o->config_out, "w");
	if (!f)
		return -1;
	fprintf(
	    f,
	    "# Written by stopcock-sim for its bench: `stopcockd -c %s` drives it.\n"
	    "http:\n"
	    "  listen: %s\n"
	    "  token_file: %s\n"
	    "  read_needs_token: false\n"
	    "storage:\n"
	    "  database: %s/stopcock.db\n"
	    "methods_dir: %s/methods\n"
	    "# The simulated titrant is exactly its nominal molarity: assays may run\n"
	    "# before any standardization (a real bench keeps titer_required: true).\n"
	    "records: {titer_required: false}\n"
	    "stations:\n"
	    "  - name: sim1\n"
	    "    vessel_max_ml: 150\n"
	    "    burette:\n"
	    "      driver: pump-serial\n"
	    "      port: %s\n"
	    "      baud: 9600\n"
	    "      parity: none\n"
	    "      stop_bits: 1\n"
	    "      timeout_ms: 500\n"
	    "      profile: %s/pumps/sim.yaml\n"
	    "      capacity_ml: %.6g\n"
	    "      steps: %ld\n"
	    "    probe:\n"
	    "      driver: probe-modbus\n"
	    "      transport: tcp\n"
	    "      host: %s\n"
	    "      port: %d\n"
	    "      unit: 1\n"
	    "      response_timeout_ms: 300\n"
	    "      registers:\n"
	    "        mv: {table: input, address: %d, type: float32, word_order: big}\n"
	    "        temperature_c: {table: input, address: %d, type: float32, word_order: big}\n"
	    "        status: {table: input, address: %d, type: uint16}\n"
	    "        counter: {table: input, address: %d, type: uint16}\n"
	    "    stirrer:\n"
	    "      driver: stirrer-modbus\n"
	    "      transport: tcp\n"
	    "      host: %s\n"
	    "      port: %d\n"
	    "      unit: 1\n"
	    "      coil: %d\n"
	    "      speed_register: %d\n"
	    "      rpm: 300\n"
	    "%s%s%s",
	    cfg_abs, o->listen ? o->listen : "127.0.0.1:8470", token, dir_abs, data, pump_abs, data,
	    s->scen.burette.capacity_ml, s->scen.burette.steps, s->tcp_host, s->tcp_port,
	    SIM_REG_MV, SIM_REG_TEMP, SIM_REG_STATUS, SIM_REG_COUNTER, s->tcp_host, s->tcp_port,
	    SIM_COIL_STIRRER, SIM_HOLD_STIR_RPM, changer, dosers, balance);
	return fclose(f) == 0 ? 0 : -1;
}

/* Both ends answer: a status query over the pump pty, a register read over
 * TCP (and RTU). Tries for up to 5 s. */
/* Does the line-protocol device at `port` answer `cmd` with a line that
 * starts with "AT "? */
static bool line_answers(const char *port, const char *cmd)
{
	link_serial_t l = {.baud = 9600, .parity = 'N', .stop_bits = 1};
	snprintf(l.port, sizeof(l.port), "%s", port);
	serial_t ser;
	serial_init(&ser);
	drv_err_t e;
	char line[128];
	bool ok = serial_open(&ser, &l, &e) == DRV_OK &&
	          serial_write(&ser, cmd, strlen(cmd), clock_mono_s() + 0.5, &e) == DRV_OK &&
	          serial_read_line(&ser, "\r\n", line, sizeof(line), clock_mono_s() + 0.5, &e) ==
	              DRV_OK &&
	          !strncmp(line, "AT ", 3);
	serial_close(&ser);
	return ok;
}

static int self_check(const sim_t *s, const char *pump_abs)
{
	double until = clock_mono_s() + 5.0;
	bool pump_ok = false, tcp_ok = false, rtu_ok = !s->rtu_link[0];
	bool changer_ok = !s->changer.present;
	bool dosers_ok[SIM_MAX_DOSERS] = {false};
	for (int i = 0; i < s->n_dosers; i++)
		dosers_ok[i] = false;
	for (int i = s->n_dosers; i < SIM_MAX_DOSERS; i++)
		dosers_ok[i] = true;
	while (clock_mono_s() < until && !(pump_ok && tcp_ok && rtu_ok && changer_ok)) {
		if (!pump_ok)
			pump_ok = line_answers(pump_abs, "STAT\n");
		/* each doser answers too, or the pump does not count as ready */
		for (int i = 0; i < s->n_dosers; i++)
			if (!dosers_ok[i])
				dosers_ok[i] = line_answers(s->dosers[i].link, "STAT\n");
		for (int i = 0; i < s->n_dosers && pump_ok; i++)
			pump_ok = dosers_ok[i];
		if (!changer_ok)
			changer_ok = line_answers(s->changer_link, "WHERE\n");
		for (int k = 0; k < 2; k++) {
			if (k == 0 ? tcp_ok : rtu_ok)
				continue;
			modbus_t *ctx = k == 0 ? modbus_new_tcp(s->tcp_host, s->tcp_port)
			                       : modbus_new_rtu(s->rtu_link, 19200, 'E', 8, 1);
			if (!ctx)
				continue;
			modbus_set_slave(ctx, 1);
			modbus_set_response_timeout(ctx, 0, 300000);
			uint16_t r[2];
			if (modbus_connect(ctx) == 0) {
				if (modbus_read_input_registers(ctx, 0, 2, r) == 2) {
					if (k == 0)
						tcp_ok = true;
					else
						rtu_ok = true;
				}
				modbus_close(ctx);
			}
			modbus_free(ctx);
		}
		if (!(pump_ok && tcp_ok && rtu_ok && changer_ok)) {
			struct timespec ts = {0, 50000000L};
			nanosleep(&ts, NULL);
		}
	}
	if (!pump_ok)
		fprintf(stderr, "stopcock-sim: the pump pty (or a doser's) does not answer\n");
	if (!tcp_ok)
		fprintf(stderr, "stopcock-sim: the Modbus TCP server does not answer\n");
	if (!rtu_ok)
		fprintf(stderr, "stopcock-sim: the Modbus RTU pty does not answer\n");
	if (!changer_ok)
		fprintf(stderr, "stopcock-sim: the changer pty does not answer\n");
	return pump_ok && tcp_ok && rtu_ok && changer_ok ? 0 : -1;
}

int main(int argc, char **argv)
{
	opts_t o;
	if (argc >= 2 && !strcmp(argv[1], "control"))
		return sim_control_client(argc - 2, argv + 2);
	if (parse_args(argc, argv, &o) != 0) {
		fprintf(stderr, "stopcock-sim: see 'stopcock-sim --help'\n");
		return 2;
	}
	chem_scenario_t scen;
	static sim_rack_t rack;
	diag_list_t d = DIAG_LIST_INIT;
	if (o.rack ? sim_rack_load(o.rack, &rack, &d) : scenario_load(o.scenario, &scen, &d)) {
		diag_print(&d, stderr);
		diag_free(&d);
		return 2;
	}
	diag_free(&d);
	if (o.rack) /* the burette and the electrode: the first beaker's scenario */
		scen = *rack.scen[rack.first];

	static sim_t s;
	if (sim_init(&s, &scen, o.seed) != 0 ||
	    (o.rack && sim_changer_attach(&s, &rack, o.seed) != 0)) {
		fprintf(stderr, "stopcock-sim: out of memory\n");
		sim_rack_free(&rack);
		return 1;
	}
	int rc = 1;
	int ctl_fd = -1;
	char pump_abs[LINK_PATH_MAX];
	const char *colon = strrchr(o.tcp, ':');
	if (!colon || colon - o.tcp >= (long)sizeof(s.tcp_host)) {
		fprintf(stderr, "stopcock-sim: --modbus-tcp wants HOST:PORT (got %s)\n", o.tcp);
		sim_rack_free(&rack);
		sim_free(&s);
		return 2;
	}
	snprintf(s.tcp_host, sizeof(s.tcp_host), "%.*s", (int)(colon - o.tcp), o.tcp);
	int want_port = atoi(colon + 1);
	char changer_rel[LINK_PATH_MAX + 16];
	snprintf(changer_rel, sizeof(changer_rel), "%s.changer", o.pump_link);
	if (abs_path(o.pump_link, pump_abs, sizeof(pump_abs)) != 0 ||
	    (o.rtu_link && abs_path(o.rtu_link, s.rtu_link, sizeof(s.rtu_link)) != 0) ||
	    (o.rack && abs_path(o.changer_link ? o.changer_link : changer_rel, s.changer_link,
	                        sizeof(s.changer_link)) != 0)) {
		fprintf(stderr, "stopcock-sim: the directory of a link path does not exist\n");
		sim_rack_free(&rack);
		sim_free(&s);
		return 2;
	}
	snprintf(s.pump_link, sizeof(s.pump_link), "%s", pump_abs);
	if (o.rack) /* a doser per name in the rack's scenarios, beside the pump */
		sim_dosers_attach(&s, &rack, pump_abs);
	/* The balance: with --balance-weight, or a rack file that weighs. */
	s.balance.fixed_g = o.balance_g;
	s.balance.present = o.balance_g > 0;
	for (int i = 1; i <= SIM_RACK_POSITIONS; i++) {
		s.balance.weight_g[i] = rack.weight_g[i];
		s.balance.present = s.balance.present || rack.weight_g[i] > 0;
	}
	s.balance.settle = s.balance.settle_left = SIM_BALANCE_SETTLE;
	snprintf(s.balance_link, sizeof(s.balance_link), "%s.balance", pump_abs);
	sim_rack_free(&rack);
	/* Open every fd early (libmodbus uses select: fds must stay < 1024). */
	s.tcp_listen_fd = sim_tcp_listen(s.tcp_host, want_port, &s.tcp_port);
	if (s.tcp_listen_fd < 0) {
		fprintf(stderr, "stopcock-sim: cannot listen on %s: %s\n", o.tcp, strerror(errno));
		sim_free(&s);
		return 1;
	}
	if (o.control && (ctl_fd = sim_control_bind(o.control)) < 0) {
		fprintf(stderr, "stopcock-sim: cannot bind %s: %s\n", o.control, strerror(errno));
		close(s.tcp_listen_fd);
		sim_free(&s);
		return 1;
	}

	/* Signals are taken by sigwait in this thread only. */
	sigset_t set;
	sigemptyset(&set);
	sigaddset(&set, SIGTERM);
	sigaddset(&set, SIGINT);
	pthread_sigmask(SIG_BLOCK, &set, NULL);
	signal(SIGPIPE, SIG_IGN);

	pthread_t th[6 + SIM_MAX_DOSERS];
	int nth = 0;
	sim_control_arg_t ca = {&s, ctl_fd};
	pthread_create(&th[nth++], NULL, sim_pump_thread, &s);
	pthread_create(&th[nth++], NULL, sim_tcp_thread, &s);
	if (o.rtu_link)
		pthread_create(&th[nth++], NULL, sim_rtu_thread, &s);
	if (o.rack)
		pthread_create(&th[nth++], NULL, sim_changer_thread, &s);
	if (s.balance.present)
		pthread_create(&th[nth++], NULL, sim_balance_thread, &s);
	for (int i = 0; i < s.n_dosers; i++)
		pthread_create(&th[nth++], NULL, sim_doser_thread, &s.dosers[i]);
	if (ctl_fd >= 0)
		pthread_create(&th[nth++], NULL, sim_control_thread, &ca);

	if (self_check(&s, pump_abs) != 0)
		goto out;
	if (o.config_out && write_config(&o, &s, pump_abs) != 0) {
		fprintf(stderr, "stopcock-sim: cannot write %s: %s\n", o.config_out,
		        strerror(errno));
		goto out;
	}
	fprintf(stderr, "stopcock-sim: pump on %s, Modbus TCP on %s:%d%s%s%s%s\n", pump_abs,
	        s.tcp_host, s.tcp_port, o.rtu_link ? ", RTU on " : "", o.rtu_link ? s.rtu_link : "",
	        o.rack ? ", changer on " : "", o.rack ? s.changer_link : "");
	printf("ready\n");
	fflush(stdout);
	int sig;
	sigwait(&set, &sig);
	rc = 0;
out:
	atomic_store(&s.stop, true);
	for (int i = 0; i < nth; i++)
		pthread_join(th[i], NULL);
	close(s.tcp_listen_fd);
	if (ctl_fd >= 0) {
		close(ctl_fd);
		unlink(o.control);
	}
	sim_free(&s);
	return rc;
}
