/* sim.h: the simulated bench of `stopcock-sim` (daemon/sim/stopcock_sim.c).
 *
 * One sim_t holds the beaker, the pump's mechanics, the transmitter's
 * register image and the injected fault, all under one mutex. Threads:
 * the pump (its pty, and the clock: sim_tick), Modbus TCP, Modbus RTU (when
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
	SIM_FAULT_COUNT
} sim_fault_t;

#define SIM_SLOW_PROBE_S   1.5  /* beyond a typical 300-500 ms response timeout */
#define SIM_MEASURE_S      0.1  /* the transmitter measures at 10 Hz */
#define SIM_PUMP_MAX_SPEED 8000 /* steps/s, as config/pumps/sim.yaml says */

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

typedef struct sim {
	pthread_mutex_t mu;
	beaker_t *beaker;
	chem_scenario_t scen;
	sim_pump_t pump;
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

/* The control socket's command -> one reply line (no newline). Takes s->mu. */
void sim_control_command(sim_t *s, const char *line, char *reply, size_t cap);

/* Threads (arg: sim_t *). Each returns when s->stop is set. */
void *sim_pump_thread(void *arg);
void *sim_tcp_thread(void *arg);
void *sim_rtu_thread(void *arg);

/* Control socket: bind now (so `ready` means it answers), serve in a thread. */
int sim_control_bind(const char *path);
/* `stopcock-sim control SOCKET COMMAND...` (argv from SOCKET on): sends one
 * command, prints the reply; 0 on a reply other than "error: ...". */
int sim_control_client(int argc, char **argv);
void *sim_control_thread(void *arg); /* arg: sim_control_arg_t * */
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
