/* Driver speed measurements: the pure parsers, and round trips through the real
 * transports against the simulator's devices in this process (pump over a
 * pty, transmitter over Modbus TCP on loopback). Targets (ours): a pump
 * status round trip under 5 ms and a probe read under 5 ms, so a station can
 * poll both at 10 Hz with room to spare. */
#include <pthread.h>
#include <stdio.h>
#include <string.h>
#include <unistd.h>

#include "speed.h"
#include "drv.h"
#include "mbus.h"
#include "pump_profile.h"
#include "scenario.h"
#include "sim.h"

SPEED(drv_pump_reply_parser)
{
	pump_profile_t p;
	diag_list_t d = DIAG_LIST_INIT;
	if (pump_profile_load("config/pumps/sim.yaml", &p, &d) != 0) {
		diag_print(&d, stderr);
		diag_free(&d);
		return;
	}
	static const char *const lines[] = {"AT 12345 MOVING", "\x01\x1b#~AT 20000 IDLE", "OK",
	                                    "ERR 5 motor stall", "\x80\x9c\x7f garbage"};
	const int n = 200000;
	volatile long sink = 0;
	double t0 = speed_cpu_s();
	for (int i = 0; i < n; i++) {
		pump_reply_t r;
		sink += pump_parse_reply(&p, lines[i % 5], &r);
	}
	double us = (speed_cpu_s() - t0) / n * 1e6;
	printf("  pump reply parse: %.3f us/line (%d lines)\n", us, n);
	(void)sink;
}

SPEED(drv_modbus_decode)
{
	const int n = 5000000;
	uint16_t r[2] = {0x4148, 0};
	volatile double sink = 0;
	double t0 = speed_cpu_s();
	for (int i = 0; i < n; i++) {
		double v;
		r[1] = (uint16_t)i;
		mbus_decode(r, MBUS_FLOAT32, (mbus_order_t)(i & 1), &v);
		sink += v;
	}
	printf("  float32 decode: %.1f ns/value\n", (speed_cpu_s() - t0) / n * 1e9);
	(void)sink;
}

static const char scen_text[] = "sample:\n  - {name: hydrochloric acid, molar: 0.01, strong: "
                                "acid}\ntitrant:\n  - {name: sodium hydroxide, molar: 0.1, "
                                "strong: base}\nsample_ml: 10\n";

SPEED(drv_round_trips)
{
	static sim_t s;
	chem_scenario_t sc;
	diag_list_t d = DIAG_LIST_INIT;
	if (scenario_parse("speed.yaml", scen_text, strlen(scen_text), &sc, &d) != 0 ||
	    sim_init(&s, &sc, 3) != 0) {
		diag_print(&d, stderr);
		diag_free(&d);
		return;
	}
	snprintf(s.pump_link, sizeof(s.pump_link), "/tmp/stopcock-speed-pump-%d", (int)getpid());
	snprintf(s.tcp_host, sizeof(s.tcp_host), "127.0.0.1");
	s.tcp_listen_fd = sim_tcp_listen("127.0.0.1", 0, &s.tcp_port);
	pthread_t tp, tt;
	pthread_create(&tp, NULL, sim_pump_thread, &s);
	pthread_create(&tt, NULL, sim_tcp_thread, &s);
	for (int i = 0; i < 200 && access(s.pump_link, F_OK) != 0; i++)
		usleep(5000);
	char cfg[1400];
	snprintf(cfg, sizeof(cfg),
	         "{b: {driver: pump-serial, port: %s, profile: config/pumps/sim.yaml}, "
	         "p: {driver: probe-modbus, host: 127.0.0.1, port: %d, registers: {mv: "
	         "{address: 0, type: float32}, temperature_c: {address: 4, type: float32}, "
	         "counter: {address: 7, type: uint16}}}}",
	         s.pump_link, s.tcp_port);
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	drv_burette_t b;
	drv_probe_t p;
	drv_err_t e;
	memset(&b, 0, sizeof(b));
	memset(&p, 0, sizeof(p));
	if (yt_load_buffer("speed.yaml", cfg, strlen(cfg), &doc, &d) != 0 ||
	    drv_burette_configure(&doc, yt_get(doc.root, "b"), &b, &d) != 0 ||
	    drv_probe_configure(&doc, yt_get(doc.root, "p"), &p, &d) != 0 ||
	    drv_burette_open(&b, &e) != DRV_OK || drv_probe_open(&p, &e) != DRV_OK) {
		diag_print(&d, stderr);
		fprintf(stderr, "  setup failed: %s\n", e.msg);
		goto out;
	}
	const int n = 300;
	double worst = 0, t0 = speed_wall_s();
	int bad = 0;
	for (int i = 0; i < n; i++) {
		drv_burette_status_t st;
		double t1 = speed_wall_s();
		bad += drv_burette_status(&b, &st, &e) != DRV_OK;
		double dt = speed_wall_s() - t1;
		if (dt > worst)
			worst = dt;
	}
	double mean = (speed_wall_s() - t0) / n;
	printf("  pump status over pty: mean %.3f ms, worst %.3f ms, %d failed (target < 5 ms: "
	       "%s)\n",
	       mean * 1e3, worst * 1e3, bad, mean < 5e-3 ? "met" : "NOT met");
	worst = 0;
	bad = 0;
	t0 = speed_wall_s();
	for (int i = 0; i < n; i++) {
		drv_reading_t r;
		double t1 = speed_wall_s();
		bad += drv_probe_read(&p, &r, &e) != DRV_OK;
		double dt = speed_wall_s() - t1;
		if (dt > worst)
			worst = dt;
	}
	mean = (speed_wall_s() - t0) / n;
	printf("  probe read over Modbus TCP: mean %.3f ms, worst %.3f ms, %d failed (target < 5 "
	       "ms: %s)\n",
	       mean * 1e3, worst * 1e3, bad, mean < 5e-3 ? "met" : "NOT met");
out:
	drv_burette_close(&b);
	drv_probe_close(&p);
	yt_free(&doc);
	diag_free(&d);
	atomic_store(&s.stop, true);
	pthread_join(tp, NULL);
	pthread_join(tt, NULL);
	close(s.tcp_listen_fd);
	sim_free(&s);
}
