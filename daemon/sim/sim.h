/* sim.h: the simulated bench of `stopcock-sim` (daemon/sim/stopcock_sim.c).
 *
 * One sim_t holds the beaker, the pump's mechanics, the transmitter's
 * register image, the sample changer with its rack (with --rack) and the
 * injected fault, all under one mutex. Threads: the pump (its pty, and the
 * clock: sim_tick), the changer (its pty), Modbus TCP, Modbus RTU (when
 * asked) and the control socket. Protocols and register map: docs/drivers.md.
 */
#ifndef STOPCOCK_SIM_H
#define STOPCOCK_SIM_H

#include <pthread.h>
#include <stdatomic.h>
#include <stdbool.h>
#include <stdint.h>

#include "beaker.h"
#include "chem.h"
#include "yamltree.h"

typedef enum {
	SIM_FAULT_NONE = 0,
	SIM_FAULT_NOISE,            /* garbage bytes on the pump line */
	SIM_FAULT_MUTE_PUMP,        /* the pump reads but never answers */
	SIM_FAULT_MUTE_PROBE,       /* the transmitter never answers */
	SIM_FAULT_SLOW_PROBE,       /* the transmitter answers after SIM_SLOW_PROBE_S */
	SIM_FAULT_MODBUS_EXCEPTION, /* the transmitter answers exception 4 */
	SIM_FAULT_STALL,            /* the pump motor stalls and reports an error */
	SIM_FAULT_FROZEN_PROBE,     /* registers stop changing */
	SIM_FAULT_UNPLUG,           /* ptys closed, TCP connections dropped */
	SIM_FAULT_JAM,              /* the rack stops where it is; the changer reports an error */
	SIM_FAULT_STUCK_LIFT,       /* the lift stops part way; the changer reports an error */
	SIM_FAULT_MUTE_CHANGER,     /* the changer reads but never answers */
	SIM_FAULT_MUTE_BALANCE,     /* the balance reads but never answers */
	SIM_FAULT_BALANCE_GARBAGE,  /* the balance answers every question with garbage */
	SIM_FAULT_COUNT
} sim_fault_t;

#define SIM_SLOW_PROBE_S   1.5  /* beyond a typical 300-500 ms response timeout */
#define SIM_MEASURE_S      0.1  /* the transmitter measures at 10 Hz */
#define SIM_PUMP_MAX_SPEED 8000 /* steps/s, as config/pumps/sim.yaml says */
#define SIM_RACK_POSITIONS 16   /* as config/changers/sim.yaml says */
#define SIM_MOVE_S         0.1  /* the rack's start and stop, s */
#define SIM_MOVE_PER_POS_S 0.05 /* the rack turning past one position, s */
#define SIM_BALANCE_SETTLE 2    /* settling replies before each stable weight */
#define SIM_LIFT_S         0.3  /* the head going up or down, s */
#define SIM_AIR_STEP_MV    6.0  /* largest drift of an electrode in air per measurement, mV */
#define SIM_AIR_LIMIT_MV   400.0
#define SIM_CARRY_ML                                                                               \
	0.05 /* solution the head takes from one beaker into the next                              \
	      * when it was not rinsed between them, mL */

/* Register map (input registers; holding registers 0..15 mirror them). */
enum {
	SIM_REG_MV = 0,      /* float32, big word order, mV */
	SIM_REG_PH = 2,      /* float32, pH computed with the scenario's electrode */
	SIM_REG_TEMP = 4,    /* float32, degC */
	SIM_REG_STATUS = 6,  /* uint16, 0 = healthy */
	SIM_REG_COUNTER = 7, /* uint16, +1 per measurement */
	SIM_REG_MV_X10 = 8,  /* int16, 0.1 mV */
	SIM_REG_MV_UV = 9,   /* int32, little word order, microvolts */
	SIM_NREGS = 16,
	SIM_COIL_STIRRER = 0,  /* coil: stirrer on */
	SIM_HOLD_STIR_RPM = 20 /* holding register: stirrer speed, rpm */
};

const char *sim_fault_name(sim_fault_t f);  /* "noise", "mute-pump", ... ; NULL for NONE */
sim_fault_t sim_fault_parse(const char *s); /* SIM_FAULT_COUNT when unknown */

typedef struct sim_pump {
	long steps; /* per full stroke */
	double capacity_ml;
	long pos;      /* steps of titrant in the syringe (0 = empty) */
	long target;   /* where the plunger is going */
	double speed;  /* steps/s of the move in progress */
	double frac;   /* fractional step carried between ticks */
	bool valve_in; /* valve at the reservoir (true) or the outlet */
	bool moving;
	unsigned long replies; /* count, for the noise pattern */
} sim_pump_t;

/* A rack file (docs/stopcock-sim.1, RACK FILE): the scenario at each
 * position, the rinse and the park positions (0 when not given). */
typedef struct sim_rack {
	chem_scenario_t *scen[SIM_RACK_POSITIONS + 1]; /* by position; NULL: no beaker */
	char file[SIM_RACK_POSITIONS + 1][256];        /* as the rack file names it */
	long rinse, park;
	long first;                              /* the lowest position holding a beaker */
	double weight_g[SIM_RACK_POSITIONS + 1]; /* `weights:` by position, g; 0: none */
} sim_rack_t;

/* The balance (config/balances/sim.yaml's protocol): on the pan is the
 * sample of the position the changer is at when the rack file gives it a
 * weight, else fixed_g. Each weight is first reported settling `settle`
 * times, as a pan still swinging. */
typedef struct sim_balance {
	bool present;
	double fixed_g;
	double weight_g[SIM_RACK_POSITIONS + 1]; /* by position, g; 0: none */
	int settle;                              /* settling replies before each stable weight */
	int settle_left;                         /* of the weighing in progress */
} sim_balance_t;

typedef struct sim_changer {
	bool present;
	long pos;           /* where the rack is, 1 .. SIM_RACK_POSITIONS */
	long target;        /* where it is going */
	double move_left_s; /* of the move in progress; 0 when still */
	int lift;           /* 0 up, 1 down, 2 between (the {lift} of the profile) */
	int lift_to;        /* 0 or 1 while the lift moves */
	double lift_left_s; /* of the lift move in progress */
	double pump_left_s; /* of the rinse or waste pump run in progress */
	bool jammed, stuck; /* a move / a lift failed under a fault, until HALT */
	double spilled_ml;  /* titrant dispensed with no beaker under the head, mL */
	long wet_from;      /* the position whose solution wets the head; 0 when rinsed */
	double carried_ml;  /* solution carried between beakers so far, mL */
	double air_mv;      /* the drifting potential of the electrode in air, mV */
	beaker_t *beakers[SIM_RACK_POSITIONS + 1]; /* by position; NULL: none */
	long rinse, park;
} sim_changer_t;

/* A dosing unit of the rack's scenarios (their `dosers:`): a syringe pump
 * of its own on its own pty, speaking the burette's protocol, whose reagent
 * goes into the beaker under the lowered head. */
#define SIM_MAX_DOSERS 4
struct sim;
typedef struct sim_doser {
	char name[CHEM_NAME_MAX];
	chem_comp_t reagent; /* molar: the reagent's concentration, mol/L */
	sim_pump_t pump;
	double dispensed_ml; /* through the outlet since start, mL */
	char link[512];
	struct sim *sim; /* for its thread */
	int index;
} sim_doser_t;

typedef struct sim {
	pthread_mutex_t mu;
	beaker_t *beaker;
	chem_scenario_t scen;
	sim_pump_t pump;
	sim_changer_t changer; /* .present only with a rack */
	sim_balance_t balance; /* .present only with a balance link */
	int n_dosers;
	sim_doser_t dosers[SIM_MAX_DOSERS];
	uint16_t regs[SIM_NREGS];
	uint16_t counter;
	double mv; /* last measured electrode mV */
	double next_measure_s;
	bool stir_on;
	uint16_t stir_rpm;
	sim_fault_t fault;
	double fault_until_s; /* 0: until clear */
	double last_tick_s;
	unsigned long long rng;
	atomic_bool stop;
	/* links */
	char pump_link[512];
	char changer_link[512];
	char balance_link[512];
	char rtu_link[512];
	char tcp_host[64];
	int tcp_port;
	int tcp_listen_fd;
} sim_t;

int sim_init(sim_t *s, const chem_scenario_t *scen, unsigned long long seed);
void sim_free(sim_t *s);

/* Advance the clock to now (CLOCK_MONOTONIC s): plunger, beaker, transmitter,
 * fault expiry. Caller holds s->mu. */
void sim_tick(sim_t *s, double now_s);

/* One pump command line (no terminator) -> reply (no terminator); returns
 * false when there is no reply (mute). Caller holds s->mu. */
bool sim_pump_command(sim_t *s, const char *line, char *reply, size_t cap);

/* Read a rack file: each scenario relative to the rack file; errors as
 * file:line:col in d. Returns 0 or -1 (r then holds nothing to free). */
int sim_rack_load(const char *path, sim_rack_t *r, diag_list_t *d);
int sim_rack_parse(const yt_doc_t *doc, sim_rack_t *r, diag_list_t *d);
void sim_rack_free(sim_rack_t *r);

/* Put a changer with this rack on the bench: a beaker per scenario, the
 * head up at the park position (else the first beaker). s->beaker is then
 * the beaker under the lowered head, NULL while the head is up. Returns 0,
 * or -1 out of memory. */
int sim_changer_attach(sim_t *s, const sim_rack_t *r, unsigned long long seed);

/* One changer command line -> reply; false when there is no reply (mute).
 * Caller holds s->mu. */
bool sim_changer_command(sim_t *s, const char *line, char *reply, size_t cap);

/* Advance the changer to now (from sim_tick). */
void sim_changer_tick(sim_t *s, double dt_s);

/* One balance command line -> reply; false when there is no reply (mute).
 * Caller holds s->mu. */
bool sim_balance_command(sim_t *s, const char *line, char *reply, size_t cap);

/* The control socket's command -> one reply line (no newline). Takes s->mu. */
void sim_control_command(sim_t *s, const char *line, char *reply, size_t cap);

/* Threads (arg: sim_t *). Each returns when s->stop is set. */
void *sim_pump_thread(void *arg);
void *sim_changer_thread(void *arg);
void *sim_balance_thread(void *arg);
void *sim_doser_thread(void *arg); /* arg: sim_doser_t * */

/* The dosers the rack's scenarios name (the first scenario naming one gives
 * its reagent), each a pump like the burette, full, on a link `base`.NAME.
 * Returns how many (at most SIM_MAX_DOSERS). */
int sim_dosers_attach(sim_t *s, const sim_rack_t *r, const char *base);
/* One doser command line -> reply; false when there is no reply (mute). */
bool sim_doser_command(sim_t *s, int doser, const char *line, char *reply, size_t cap);
void *sim_tcp_thread(void *arg);
void *sim_rtu_thread(void *arg);

/* Control socket: bind now (so `ready` means it answers), serve in a thread. */
int sim_control_bind(const char *path);
/* `stopcock-sim control SOCKET COMMAND...` (argv from SOCKET on): sends one
 * command, prints the reply; 0 on a reply other than "error: ...". */
int sim_control_client(int argc, char **argv);
void *sim_control_thread(void *arg); /* arg: sim_control_arg_t * */
/* Inject fault f (SIM_FAULT_NONE clears it), for for_s seconds, or until
 * changed when for_s <= 0; under the state's mutex. */
void sim_set_fault(sim_t *s, sim_fault_t f, double for_s);
typedef struct sim_control_arg {
	sim_t *sim;
	int listen_fd;
} sim_control_arg_t;

/* Create a pty in raw mode, point `link_path` at its slave (atomically).
 * Returns 0 with *master (non-blocking) and *slave open, or -1. */
int sim_pty_open(const char *link_path, int *master, int *slave);

/* Modbus TCP listen socket on host:port (port 0 = any); *port_out is the
 * port bound. Returns the fd or -1. */
int sim_tcp_listen(const char *host, int port, int *port_out);

#endif
