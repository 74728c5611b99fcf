/* test_config.c: the daemon config reader: listen addresses, paths, tokens,
 * and errors with file:line:col. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "config.h"
#include "harness.h"

static void write_file(const char *path, const char *text)
{
	FILE *f = fopen(path, "w");
	if (f) {
		fputs(text, f);
		fclose(f);
	}
}

TEST(config_listen_addresses)
{
	char a[64];
	int port = 0;
	CHECK(cfg_parse_listen("127.0.0.1:8470", a, sizeof a, &port) == 0);
	CHECK_STR(a, "127.0.0.1");
	CHECK_INT(port, 8470);
	CHECK(cfg_parse_listen("[::1]:9000", a, sizeof a, &port) == 0);
	CHECK_STR(a, "::1");
	CHECK_INT(port, 9000);
	CHECK(cfg_parse_listen("localhost:8470", a, sizeof a, &port) != 0);
	CHECK(cfg_parse_listen("127.0.0.1", a, sizeof a, &port) != 0);
	CHECK(cfg_parse_listen("127.0.0.1:70000", a, sizeof a, &port) != 0);
	CHECK(cfg_parse_listen("127.0.0.1:80x", a, sizeof a, &port) != 0);
	CHECK(cfg_parse_listen("", a, sizeof a, &port) != 0);
}

TEST(config_paths_resolve_against_the_file)
{
	char out[256];
	cfg_resolve_path("/etc/stopcock/stopcockd.yaml", "token", out, sizeof out);
	CHECK_STR(out, "/etc/stopcock/token");
	cfg_resolve_path("/etc/stopcock/stopcockd.yaml", "/var/x.db", out, sizeof out);
	CHECK_STR(out, "/var/x.db");
	cfg_resolve_path("stopcockd.yaml", "token", out, sizeof out);
	CHECK_STR(out, "token");
}

TEST(config_load_defaults_and_errors)
{
	char dir[] = "/tmp/stopcock-cfg-XXXXXX", path[128];
	static cfg_t c;
	diag_list_t d = DIAG_LIST_INIT;

	REQUIRE(mkdtemp(dir));
	snprintf(path, sizeof path, "%s/c.yaml", dir);
	write_file(path, "storage: {database: db/s.db}\n"
	                 "stations:\n"
	                 "  - name: bench-1\n"
	                 "    vessel_max_ml: 100\n"
	                 "    burette: {driver: x}\n"
	                 "    probe: {driver: y}\n");
	CHECK(cfg_load(path, &c, &d) == 0);
	CHECK_INT(d.n, 0);
	CHECK_STR(c.listen_addr, "127.0.0.1"); /* loopback unless configured */
	CHECK_INT(c.listen_port, 8470);
	CHECK_INT(c.max_body_bytes, 256 * 1024);
	CHECK(!c.read_needs_token);
	CHECK_INT(c.n_stations, 1);
	CHECK(c.stations[0].stirrer == NULL);
	CHECK(c.stations[0].read_interval_s == 0.5);
	CHECK(strstr(c.database, "/db/s.db") != NULL);
	cfg_free(&c);

	write_file(path, "http:\n"
	                 "  listen: nowhere\n"
	                 "  max_conections: 3\n"
	                 "stations:\n"
	                 "  - name: Bench_1\n"
	                 "    vessel_max_ml: 0\n"
	                 "    probe: {driver: y}\n"
	                 "    read_interval_s: 0.01\n");
	CHECK(cfg_load(path, &c, &d) != 0);
	{
		char *all = diag_join(&d);
		REQUIRE(all);
		CHECK(strstr(all, ":2:") != NULL); /* listen */
		CHECK(strstr(all, ":3:") != NULL); /* unknown key */
		CHECK(strstr(all, "max_connections") != NULL);
		CHECK(strstr(all, ":5:") != NULL); /* name */
		CHECK(strstr(all, ":6:") != NULL); /* vessel_max_ml */
		CHECK(strstr(all, "burette") != NULL);
		/* 0.01 s is below the 0.05 s the daemon allows */
		CHECK(strstr(all, ":8:") != NULL && strstr(all, "read_interval_s") != NULL);
		free(all);
	}
	diag_free(&d);
	cfg_free(&c);
	unlink(path);
	rmdir(dir);
}

TEST(config_http_guard_keys)
{
	char dir[] = "/tmp/stopcock-cfg-XXXXXX", path[128];
	static cfg_t c;
	diag_list_t d = DIAG_LIST_INIT;
	static const char stations[] = "stations:\n"
	                               "  - name: b1\n"
	                               "    vessel_max_ml: 100\n"
	                               "    burette: {driver: x}\n"
	                               "    probe: {driver: y}\n";
	char text[1024];

	REQUIRE(mkdtemp(dir));
	snprintf(path, sizeof path, "%s/c.yaml", dir);
	/* defaults: a 10 s deadline, 32 per address, localhost as the name */
	write_file(path, stations);
	CHECK(cfg_load(path, &c, &d) == 0);
	CHECK_INT(c.request_deadline_s, 10);
	CHECK_INT(c.max_per_ip, 32);
	REQUIRE(c.n_allowed_hosts == 1);
	CHECK_STR(c.allowed_hosts[0], "localhost");
	cfg_free(&c);

	snprintf(text, sizeof text,
	         "http:\n  request_deadline_s: 3\n"
	         "  allowed_hosts: [Bench7.Lab.Example., localhost]\n%s",
	         stations);
	write_file(path, text);
	CHECK(cfg_load(path, &c, &d) == 0);
	CHECK_INT(d.n, 0);
	CHECK_INT(c.request_deadline_s, 3);
	REQUIRE(c.n_allowed_hosts == 2);
	CHECK_STR(c.allowed_hosts[0], "bench7.lab.example"); /* lower case, no dot */
	CHECK_STR(c.allowed_hosts[1], "localhost");
	cfg_free(&c);

	snprintf(text, sizeof text,
	         "http:\n  request_deadline_s: 0\n"
	         "  allowed_hosts: [\"evil.example:80\", \"a..b\", ok-name]\n%s",
	         stations);
	write_file(path, text);
	CHECK(cfg_load(path, &c, &d) != 0);
	{
		char *all = diag_join(&d);
		REQUIRE(all);
		CHECK(strstr(all, ":2:") && strstr(all, "request_deadline_s"));
		CHECK(strstr(all, "'evil.example:80' is not a host name") != NULL);
		CHECK(strstr(all, "'a..b' is not a host name") != NULL);
		CHECK(strstr(all, "ok-name") == NULL);
		free(all);
	}
	diag_free(&d);
	cfg_free(&c);
	unlink(path);
	rmdir(dir);
}

TEST(config_tokens)
{
	char dir[] = "/tmp/stopcock-tok-XXXXXX", path[128];
	cfg_tokens_t t;
	diag_list_t d = DIAG_LIST_INIT;

	REQUIRE(mkdtemp(dir));
	snprintf(path, sizeof path, "%s/token", dir);
	write_file(path, "# the LIMS\nlims:0123456789abcdef0123\n\nops:short\nbadline\n");
	CHECK(cfg_load_tokens(path, &t, &d) != 0);
	CHECK_INT(t.n, 1);
	CHECK_STR(t.v[0].name, "lims");
	CHECK_STR(t.v[0].token, "0123456789abcdef0123");
	CHECK_INT(d.n, 2); /* too short, no colon */
	diag_free(&d);
	unlink(path);
	CHECK(cfg_load_tokens(path, &t, &d) != 0);
	diag_free(&d);
	rmdir(dir);
}

/* Roles: "name:role,role:token"; "name:token" keeps every role and says so;
 * a misspelt role is an error at its column, never every right. */
TEST(config_token_roles)
{
	char dir[] = "/tmp/stopcock-tok-XXXXXX", path[128], buf[64];
	cfg_tokens_t t;
	diag_list_t d = DIAG_LIST_INIT;

	REQUIRE(mkdtemp(dir));
	snprintf(path, sizeof path, "%s/token", dir);
	write_file(path, "lims:read:0123456789abcdef0123\n"
	                 "ana:read,operate:abcdef0123456789abcd\n"
	                 "old:fedcba9876543210fedc\n"
	                 "typo:read,operat:1111111111111111111\n"
	                 "empty::2222222222222222222\n"
	                 "colon:3f9a:with-colon-0123456\n");
	CHECK(cfg_load_tokens(path, &t, &d) != 0);
	REQUIRE(t.n == 4);
	CHECK_STR(t.v[0].name, "lims");
	CHECK_STR(t.v[0].token, "0123456789abcdef0123");
	CHECK_INT(t.v[0].roles, CFG_ROLE_READ);
	CHECK(!t.v[0].no_roles);
	CHECK_STR(t.v[1].token, "abcdef0123456789abcd");
	CHECK_INT(t.v[1].roles, CFG_ROLE_READ | CFG_ROLE_OPERATE);
	CHECK_STR(cfg_roles_text(t.v[1].roles, buf, sizeof buf), "read,operate");
	CHECK_INT(t.v[2].roles, CFG_ROLES_ALL);
	CHECK(t.v[2].no_roles);
	CHECK_INT(t.v[2].line, 3);
	REQUIRE(d.n == 2);
	CHECK_INT(d.v[0].line, 4);
	CHECK_INT(d.v[0].col, 11);
	CHECK(strstr(d.v[0].msg, "unknown role 'operat'") != NULL);
	CHECK_INT(d.v[1].line, 5);
	CHECK_STR(cfg_roles_text(CFG_ROLES_ALL, buf, sizeof buf), "read,operate,review,admin");
	/* A ':' inside a token from before roles stays part of it. */
	CHECK_STR(t.v[3].token, "3f9a:with-colon-0123456");
	CHECK(t.v[3].no_roles);
	diag_free(&d);
	unlink(path);
	rmdir(dir);
}

/* dosers: each a named burette driver with its reagent; every mistake is
 * reported at its line. */
TEST(config_station_dosers)
{
	char dir[] = "/tmp/stopcock-cfg-XXXXXX", path[128];
	static cfg_t c;
	diag_list_t d = DIAG_LIST_INIT;

	REQUIRE(mkdtemp(dir));
	snprintf(path, sizeof path, "%s/c.yaml", dir);
	write_file(path,
	           "stations:\n"
	           "  - name: bench-1\n"
	           "    vessel_max_ml: 150\n"
	           "    burette: {driver: x}\n"
	           "    probe: {driver: y}\n"
	           "    dosers:\n"
	           "      acid: {reagent: HCl 0.1 mol/L, molarity: 0.1, burette: {driver: z}}\n"
	           "      water-2:\n"
	           "        reagent: water\n"
	           "        molarity: 0.00001\n"
	           "        burette: {driver: w}\n");
	CHECK(cfg_load(path, &c, &d) == 0);
	CHECK_INT(d.n, 0);
	REQUIRE(c.stations[0].n_dosers == 2);
	CHECK_STR(c.stations[0].dosers[0].name, "acid");
	CHECK_STR(c.stations[0].dosers[0].reagent, "HCl 0.1 mol/L");
	CHECK_NEAR(c.stations[0].dosers[0].molarity, 0.1, 0);
	CHECK(c.stations[0].dosers[0].burette != NULL);
	CHECK_STR(c.stations[0].dosers[1].name, "water-2");
	CHECK_INT(c.stations[0].dosers[1].line, 9);
	cfg_free(&c);

	write_file(path, "stations:\n"
	                 "  - name: bench-1\n"
	                 "    vessel_max_ml: 150\n"
	                 "    burette: {driver: x}\n"
	                 "    probe: {driver: y}\n"
	                 "    dosers:\n"
	                 "      Acid: {reagent: HCl, molarity: 0.1, burette: {driver: z}}\n"
	                 "      base: {reagent: NaOH, molarity: 30, burette: {driver: z}}\n"
	                 "      salt: {reagent: NaCl, molarity: 1, burete: {driver: z}}\n"
	                 "      plain: {molarity: 1, burette: [z]}\n");
	CHECK(cfg_load(path, &c, &d) != 0);
	{
		char *all = diag_join(&d);
		REQUIRE(all);
		CHECK(strstr(all, ":7:7: doser name must be") != NULL);
		CHECK(strstr(all, ":8:") != NULL && strstr(all, "dosers.base.molarity") != NULL);
		CHECK(strstr(all, "did you mean 'burette'") != NULL);
		CHECK(strstr(all, "missing key 'burette' in dosers.salt") != NULL);
		CHECK(strstr(all, "missing key 'reagent' in dosers.plain") != NULL);
		CHECK(strstr(all, ":10:") != NULL && strstr(all, "dosers.plain.burette") != NULL);
		free(all);
	}
	diag_free(&d);
	cfg_free(&c);
	unlink(path);
	rmdir(dir);
}

/* The mqtt: section (docs/mqtt.md): absent means off; defaults; every bad
 * key at its line. */
TEST(config_mqtt_section)
{
	char dir[] = "/tmp/stopcock-cfg-XXXXXX", path[128], pw[160];
	static cfg_t c;
	diag_list_t d = DIAG_LIST_INIT;
	static const char stations[] = "stations:\n"
	                               "  - name: b1\n"
	                               "    vessel_max_ml: 100\n"
	                               "    burette: {driver: x}\n"
	                               "    probe: {driver: y}\n";
	char text[1024], secret[64];

	REQUIRE(mkdtemp(dir));
	snprintf(path, sizeof path, "%s/c.yaml", dir);
	write_file(path, stations);
	CHECK(cfg_load(path, &c, &d) == 0);
	CHECK(!c.mqtt.enabled);
	cfg_free(&c);

	snprintf(text, sizeof text,
	         "mqtt:\n  host: broker.lab\n  username: bench-7\n  password_file: pw\n"
	         "  tls: {ca_file: ca.pem}\n%s",
	         stations);
	write_file(path, text);
	CHECK(cfg_load(path, &c, &d) == 0);
	CHECK_INT(d.n, 0);
	CHECK(c.mqtt.enabled);
	CHECK_STR(c.mqtt.host, "broker.lab");
	CHECK_INT(c.mqtt.port, 1883);
	CHECK_INT(c.mqtt.keepalive_s, 30);
	CHECK_STR(c.mqtt.topic_prefix, ""); /* the daemon makes stopcock/<hostname> */
	CHECK(c.mqtt.tls);
	snprintf(pw, sizeof pw, "%s/pw", dir);
	CHECK_STR(c.mqtt.password_file, pw);
	/* --check-config: the files named must be readable */
	cfg_mqtt_check_files(&c, &d);
	CHECK_INT(d.n, 2);
	diag_free(&d);
	write_file(pw, "s3cret-word\nignored\n");
	CHECK(cfg_read_secret(pw, secret, sizeof secret, &d) == 0);
	CHECK_STR(secret, "s3cret-word");
	cfg_free(&c);

	snprintf(text, sizeof text,
	         "mqtt:\n  host: \"broker:1883\"\n  port: 0\n  topic_prefix: lab/+/x\n"
	         "  client_id: \"a b\"\n  password_file: pw\n  tls: {cert_file: c.pem}\n"
	         "  keepalive_s: 1\n  qos: 2\n%s",
	         stations);
	write_file(path, text);
	CHECK(cfg_load(path, &c, &d) != 0);
	{
		char *all = diag_join(&d);
		REQUIRE(all);
		CHECK(strstr(all, ":2:") && strstr(all, "mqtt.host"));
		CHECK(strstr(all, ":3:") && strstr(all, "mqtt.port"));
		CHECK(strstr(all, ":4:") && strstr(all, "wildcard"));
		CHECK(strstr(all, ":5:") && strstr(all, "mqtt.client_id"));
		CHECK(strstr(all, ":6:") && strstr(all, "needs mqtt.username"));
		CHECK(strstr(all, ":7:") && strstr(all, "both cert_file and key_file"));
		CHECK(strstr(all, ":8:") && strstr(all, "keepalive_s"));
		CHECK(strstr(all, ":9:") && strstr(all, "unknown key 'qos'"));
		free(all);
	}
	diag_free(&d);
	cfg_free(&c);
	unlink(pw);
	unlink(path);
	rmdir(dir);
}
