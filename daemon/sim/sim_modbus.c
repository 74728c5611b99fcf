/* sim_modbus.c: the simulated transmitter (and stirrer) as a Modbus TCP
 * server and, with --rtu-link, a Modbus RTU slave on a pty. Each thread owns
 * its libmodbus context and mapping (libmodbus does no locking); registers
 * are copied from the sim under its mutex before every reply, and coil and
 * speed writes copied back after. */
#include <errno.h>
#include <netinet/in.h>
#include <arpa/inet.h>
#include <poll.h>
#include <stdio.h>
#include <string.h>
#include <sys/socket.h>
#include <time.h>
#include <unistd.h>

#include <modbus.h>

#include "sim.h"
#include "clock.h"

#define MAX_CLIENTS 8
#define UNIT_ID     1

int sim_tcp_listen(const char *host, int port, int *port_out)
{
	int fd = socket(AF_INET, SOCK_STREAM | SOCK_CLOEXEC, 0);
	if (fd < 0)
		return -1;
	int one = 1;
	setsockopt(fd, SOL_SOCKET, SO_REUSEADDR, &one, sizeof(one));
	struct sockaddr_in a;
	memset(&a, 0, sizeof(a));
	a.sin_family = AF_INET;
	a.sin_port = htons((uint16_t)port);
	if (inet_pton(AF_INET, host, &a.sin_addr) != 1 ||
	    bind(fd, (struct sockaddr *)&a, sizeof(a)) != 0 || listen(fd, MAX_CLIENTS) != 0) {
		close(fd);
		return -1;
	}
	socklen_t al = sizeof(a);
	getsockname(fd, (struct sockaddr *)&a, &al);
	*port_out = ntohs(a.sin_port);
	return fd;
}

static modbus_mapping_t *new_map(void)
{
	/* coils 0..7, no discrete inputs, holding 0..31, input 0..15 */
	return modbus_mapping_new_start_address(0, 8, 0, 0, 0, 32, 0, SIM_NREGS);
}

/* What a fault does to one request: 0 reply, 1 no reply, 2 exception. */
static int fault_action(sim_t *s)
{
	pthread_mutex_lock(&s->mu);
	sim_fault_t f = s->fault;
	pthread_mutex_unlock(&s->mu);
	if (f == SIM_FAULT_MUTE_PROBE || f == SIM_FAULT_UNPLUG)
		return 1;
	if (f == SIM_FAULT_MODBUS_EXCEPTION)
		return 2;
	if (f == SIM_FAULT_SLOW_PROBE) {
		double until = clock_mono_s() + SIM_SLOW_PROBE_S;
		while (clock_mono_s() < until && !atomic_load(&s->stop)) {
			struct timespec ts = {0, 20000000L};
			nanosleep(&ts, NULL);
		}
	}
	return 0;
}

/* Registers in, reply, coil and speed writes out, all under the lock, so a
 * client that saw the reply also sees the change in `state`. */
static void serve_one(sim_t *s, modbus_t *ctx, modbus_mapping_t *map, const uint8_t *q, int len)
{
	int what = fault_action(s);
	if (what == 1)
		return;
	if (what == 2) {
		modbus_reply_exception(ctx, q, MODBUS_EXCEPTION_SLAVE_OR_SERVER_FAILURE);
		return;
	}
	pthread_mutex_lock(&s->mu);
	memcpy(map->tab_input_registers, s->regs, sizeof(s->regs));
	memcpy(map->tab_registers, s->regs, sizeof(s->regs));
	map->tab_bits[SIM_COIL_STIRRER] = s->stir_on;
	map->tab_registers[SIM_HOLD_STIR_RPM] = s->stir_rpm;
	modbus_reply(ctx, q, len, map);
	s->stir_on = map->tab_bits[SIM_COIL_STIRRER] != 0;
	s->stir_rpm = map->tab_registers[SIM_HOLD_STIR_RPM];
	pthread_mutex_unlock(&s->mu);
}

void *sim_tcp_thread(void *arg)
{
	sim_t *s = arg;
	modbus_t *ctx = modbus_new_tcp("127.0.0.1", 0);
	modbus_mapping_t *map = new_map();
	if (!ctx || !map) {
		fprintf(stderr, "stopcock-sim: cannot set up Modbus TCP\n");
		if (ctx)
			modbus_free(ctx);
		modbus_mapping_free(map);
		return NULL;
	}
	modbus_set_indication_timeout(ctx, 0, 200000);
	int clients[MAX_CLIENTS];
	int nc = 0;
	while (!atomic_load(&s->stop)) {
		pthread_mutex_lock(&s->mu);
		bool unplugged = s->fault == SIM_FAULT_UNPLUG;
		pthread_mutex_unlock(&s->mu);
		if (unplugged) {
			for (int i = 0; i < nc; i++)
				close(clients[i]);
			nc = 0;
		}
		struct pollfd pf[MAX_CLIENTS + 1];
		pf[0].fd = s->tcp_listen_fd;
		pf[0].events = POLLIN;
		for (int i = 0; i < nc; i++) {
			pf[i + 1].fd = clients[i];
			pf[i + 1].events = POLLIN;
		}
		int r = poll(pf, (nfds_t)nc + 1, 50);
		if (r <= 0)
			continue;
		for (int i = 0; i < nc; i++) {
			if (!(pf[i + 1].revents & (POLLIN | POLLHUP | POLLERR)) ||
			    pf[i + 1].fd != clients[i])
				continue;
			uint8_t q[MODBUS_TCP_MAX_ADU_LENGTH];
			modbus_set_socket(ctx, clients[i]);
			int len = modbus_receive(ctx, q);
			if (len > 0) {
				serve_one(s, ctx, map, q, len);
			} else if (len < 0) {
				close(clients[i]);
				clients[i] = clients[--nc];
				i--;
			}
		}
		/* accept last: pf[] covers only the clients polled above */
		if (pf[0].revents & POLLIN) {
			int c = accept4(s->tcp_listen_fd, NULL, NULL, SOCK_CLOEXEC);
			if (c >= 0 && (unplugged || nc == MAX_CLIENTS))
				close(c); /* unplugged: the far end is gone */
			else if (c >= 0)
				clients[nc++] = c;
		}
	}
	for (int i = 0; i < nc; i++)
		close(clients[i]);
	modbus_set_socket(ctx, -1);
	modbus_free(ctx);
	modbus_mapping_free(map);
	return NULL;
}

void *sim_rtu_thread(void *arg)
{
	sim_t *s = arg;
	modbus_mapping_t *map = new_map();
	if (!map)
		return NULL;
	int master = -1, slave = -1;
	modbus_t *ctx = NULL;
	while (!atomic_load(&s->stop)) {
		pthread_mutex_lock(&s->mu);
		bool unplugged = s->fault == SIM_FAULT_UNPLUG;
		pthread_mutex_unlock(&s->mu);
		if (unplugged && master >= 0) {
			unlink(s->rtu_link);
			modbus_free(ctx); /* not modbus_close: we own the fd */
			ctx = NULL;
			close(master);
			close(slave);
			master = slave = -1;
		}
		if (!unplugged && master < 0) {
			if (sim_pty_open(s->rtu_link, &master, &slave) != 0) {
				fprintf(stderr, "stopcock-sim: cannot create the RTU pty: %s\n",
				        strerror(errno));
				master = -1;
			} else {
				ctx = modbus_new_rtu("/dev/null", 19200, 'E', 8, 1);
				if (!ctx) {
					close(master);
					close(slave);
					master = slave = -1;
				} else {
					modbus_set_slave(ctx, UNIT_ID);
					modbus_set_socket(ctx, master);
					modbus_set_indication_timeout(ctx, 0, 200000);
				}
			}
		}
		if (master < 0) {
			struct timespec ts = {0, 20000000L};
			nanosleep(&ts, NULL);
			continue;
		}
		struct pollfd pf = {.fd = master, .events = POLLIN};
		if (poll(&pf, 1, 50) <= 0 || !(pf.revents & POLLIN))
			continue;
		uint8_t q[MODBUS_RTU_MAX_ADU_LENGTH];
		int len = modbus_receive(ctx, q);
		if (len > 0)
			serve_one(s, ctx, map, q, len);
		else if (len < 0)
			modbus_flush(ctx); /* a broken frame: drop what is left of it */
	}
	if (master >= 0) {
		unlink(s->rtu_link);
		modbus_free(ctx);
		close(master);
		close(slave);
	}
	modbus_mapping_free(map);
	return NULL;
}
