/* config.h: the daemon configuration, stopcockd.yaml (keys in docs/config.md).
 *
 * cfg_load() reads and checks the whole file and reports every problem as
 * "file:line:col: message". Station device subtrees (burette, probe, stirrer)
 * are kept as YAML nodes: each driver's own configure op validates its keys,
 * so the daemon never learns a driver's options. The nodes live in cfg->doc,
 * so a cfg_t must outlive every driver configured from it.
 *
 * Relative paths (token_file, database, methods_dir) resolve against the
 * directory of the config file, so a config written beside its data works
 * from any working directory.
 */
#ifndef STOPCOCK_CONFIG_H
#define STOPCOCK_CONFIG_H

#include <limits.h>
#include <stdbool.h>
#include <stddef.h>

#include "diag.h"
#include "yamltree.h"

#define CFG_MAX_STATIONS     16
#define CFG_NAME_MAX         32
#define CFG_PATH_MAX         1024
#define CFG_NOTIFY_MAX_ARGS  8    /* notify_command: the program and 7 arguments */
#define CFG_NOTIFY_TIMEOUT_S 10.0 /* notify_timeout_s default, s */
#define CFG_MAX_HOSTS        16   /* http.allowed_hosts entries */
#define CFG_HOST_MAX         254  /* a DNS name, without a trailing dot */
#define CFG_MAX_TOKENS       32

/* An extra dosing unit of a station: a burette driver of its own holding
 * a reagent, used by a method's add steps (docs/methods.md, "Steps"). Its
 * capacity is its driver's (drv_burette_info). */
#define CFG_MAX_DOSERS 8
typedef struct cfg_doser {
	char name[CFG_NAME_MAX];  /* [a-z0-9-]+, what an add step's doser names */
	char reagent[160];        /* the reagent's name, as people read it */
	double molarity;          /* nominal, mol/L: addN_molarity in formulas */
	const yt_node_t *burette; /* driver subtree, in cfg_t.doc */
	int line, col;            /* of the doser's entry, for messages */
} cfg_doser_t;

typedef struct cfg_station {
	char name[CFG_NAME_MAX];  /* [a-z0-9-]+ */
	double vessel_max_ml;     /* most liquid the beaker may hold, mL */
	double read_interval_s;   /* probe readings while settling, s (default 0.5) */
	const yt_node_t *burette; /* driver subtrees, in cfg_t.doc */
	const yt_node_t *probe;
	const yt_node_t *stirrer; /* NULL when absent */
	const yt_node_t *changer; /* sample changer; NULL when absent */
	const yt_node_t *balance; /* weighs series samples; NULL when absent */
	int line, col;            /* of the station's entry, for messages */
	/* dosers: the station's extra dosing units (docs/config.md) */
	int n_dosers;
	cfg_doser_t dosers[CFG_MAX_DOSERS];
} cfg_station_t;

/* The optional mqtt: section (docs/mqtt.md): where results, events and
 * station states are published. enabled is false without the section. */
#define CFG_TOPIC_MAX 200
typedef struct cfg_mqtt {
	bool enabled;
	char host[CFG_HOST_MAX + 1];      /* a host name or a numeric address */
	int port;                         /* default 1883 (8883 is usual with tls) */
	char topic_prefix[CFG_TOPIC_MAX]; /* "" = stopcock/<hostname>, set by the daemon */
	char client_id[64];               /* "" = stopcock-<hostname>-<pid>, set by the daemon */
	char username[128];               /* "" = none */
	char password_file[CFG_PATH_MAX]; /* "" = none; the password is its first line */
	bool tls;
	char ca_file[CFG_PATH_MAX];
	char cert_file[CFG_PATH_MAX]; /* client certificate and key: both or neither */
	char key_file[CFG_PATH_MAX];
	unsigned keepalive_s;
	unsigned outbox_max_messages; /* the outbox policy (docs/mqtt.md, "Outbox") */
	unsigned outbox_max_age_days;
	int line, col; /* of the section, for messages */
} cfg_mqtt_t;

typedef struct cfg {
	char path[CFG_PATH_MAX]; /* the file read */
	/* http */
	char listen_addr[64]; /* numeric IPv4 or IPv6 address */
	int listen_port;
	char token_file[CFG_PATH_MAX]; /* "" when none: then every write gets 401 */
	bool read_needs_token;
	unsigned max_connections;      /* total open connections */
	unsigned max_per_ip;           /* per client address; 0 = no limit */
	unsigned max_body_bytes;       /* request bodies above this get 413 */
	unsigned connection_timeout_s; /* idle connections are closed after this */
	unsigned request_deadline_s;   /* a request's headers and body must be in by then, s */
	unsigned threads;              /* HTTP worker threads */
	/* Names a request's Host may give besides an IP address (lower case);
	 * anything else gets 421, so a DNS-rebinding page cannot read the API. */
	int n_allowed_hosts;
	char allowed_hosts[CFG_MAX_HOSTS][CFG_HOST_MAX + 1];
	/* storage */
	char database[CFG_PATH_MAX];
	char methods_dir[CFG_PATH_MAX]; /* "" when none */
	int n_stations;
	cfg_station_t stations[CFG_MAX_STATIONS];
	/* records: (docs/config.md): an assay needs a stored titer unless
	 * titer_required is false; a titer or blank older than its validity,
	 * days, refuses the assay. Per titrant, a titer entered by hand
	 * carries its own valid_days. */
	bool titer_required;
	double titer_valid_days, blank_valid_days;
	char lab_name[128]; /* records.lab_name: the header of a run's PDF report; "" none */
	/* notify_command (docs/operations.md, "Alarms"): the program and its
	 * arguments, run without a shell on events a person must see; n 0 when
	 * none. notify_timeout_s: how long it may run before it is killed. */
	int n_notify_argv;
	char notify_argv[CFG_NOTIFY_MAX_ARGS][CFG_PATH_MAX];
	double notify_timeout_s;
	/* parsed by calib.h (calib_config_parse, standardization_config_parse); NULL: absent */
	const yt_node_t *calibration;
	const yt_node_t *standardization;
	cfg_mqtt_t mqtt; /* the optional mqtt: section */
	yt_doc_t doc;    /* owns the station subtrees */
} cfg_t;

/* Load and check. Returns 0, or -1 with every error added (sorted). On -1 the
 * struct may be partly filled; always call cfg_free(). */
int cfg_load(const char *path, cfg_t *c, diag_list_t *d);
void cfg_free(cfg_t *c);

/* "ADDR:PORT" or "[V6ADDR]:PORT". Returns 0 or -1. */
int cfg_parse_listen(const char *s, char *addr, size_t addr_cap, int *port);

/* Resolve `rel` against the directory of `base_file` into out. */
void cfg_resolve_path(const char *base_file, const char *rel, char *out, size_t cap);

/* Tokens: file of lines "name:role,role:token" or "name:token" (blank lines
 * and '#' comments skipped). Tokens shorter than 16 bytes are refused: they
 * are guessable. The roles (docs/api.md, "Roles") say what a token may do; a
 * line without roles keeps every role, as before roles existed, and
 * --check-config warns about it. */
enum {
	CFG_ROLE_READ = 1u << 0,    /* GET routes when reads need a token */
	CFG_ROLE_OPERATE = 1u << 1, /* runs, halt, resume, calibrations, titers */
	CFG_ROLE_REVIEW = 1u << 2,  /* approve or reject results */
	CFG_ROLE_ADMIN = 1u << 3,   /* methods, titers */
	CFG_ROLES_ALL = (1u << 4) - 1,
};
#define CFG_N_ROLES 4

/* The n bytes at s are a roles field (lower-case letters and commas): in a
 * line "name:FIELD:rest", rest is then the token. */
bool cfg_is_roles_field(const char *s, size_t n);
/* The name of role bit i (0 read, 1 operate, 2 review, 3 admin). */
const char *cfg_role_name(int i);
/* "read,operate" for a set of roles, into buf ("" for none). */
const char *cfg_roles_text(unsigned roles, char *buf, size_t cap);

typedef struct cfg_token {
	char name[64];
	char token[256];
	unsigned roles; /* CFG_ROLE_* bits */
	bool no_roles;  /* a "name:token" line: every role, and a warning */
	int line;       /* in the token file */
} cfg_token_t;

typedef struct cfg_tokens {
	int n;
	cfg_token_t v[CFG_MAX_TOKENS];
} cfg_tokens_t;

int cfg_load_tokens(const char *path, cfg_tokens_t *t, diag_list_t *d);

/* The first line of a password file (mqtt.password_file), without its line
 * end, into out. 0, or -1 with a diagnostic naming the file (never its
 * content). */
int cfg_read_secret(const char *path, char *out, size_t cap, diag_list_t *d);

/* --check-config: the mqtt files (password, CA, certificate, key) can be
 * read and the password file has a password; errors at the config's line. */
void cfg_mqtt_check_files(const cfg_t *c, diag_list_t *d);

const cfg_station_t *cfg_station(const cfg_t *c, const char *name);

#endif
