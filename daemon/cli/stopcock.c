/* stopcock: the command-line client and offline tools. */
#include <stdio.h>
#include <string.h>

#include "cmd.h"
#include "yamltree.h"

static const struct {
	const char *name;
	int (*fn)(int, char **);
	const char *usage;
} commands[] = {
    {"check", cmd_check, "check METHOD.yaml...          validate method files offline"},
    {"predict", cmd_predict,
     "predict METHOD.yaml --scenario S.yaml [--amount X] [--seed N] [--json]"},
    {"curve", cmd_curve, "curve S.yaml --ml 0,1,2.5,...  model pH and mV after each volume"},
    {"start", cmd_start, "start --station N --method M --sample-id ID --amount X"},
    {"status", cmd_status, "status                        stations and their current runs"},
    {"show", cmd_show, "show RUN [--csv] [--svg FILE] [--pdf FILE]"},
    {"wait", cmd_wait, "wait RUN [--timeout S]"},
    {"abort", cmd_abort, "abort RUN"},
    {"halt", cmd_halt, "halt --station N"},
    {"resume", cmd_resume, "resume --station N            let a held station start again"},
    {"calibrate", cmd_calibrate, "calibrate --station N --buffers 4.01,7.00,10.01"},
    {"titrants", cmd_titrants,
     "titrants                      stored titers and how they were found"},
    {"events", cmd_events, "events [--after SEQ] [--limit N]  the audit trail"},
    {"review", cmd_review, "review RUN --approve|--reject [--reason TEXT]  sign a run's results"},
    {"correct", cmd_correct,
     "correct RUN --reason TEXT [--amount X] [--titer X] [--blank-ml X]  a new result version"},
    {"series", cmd_series,
     "series start|show|wait|abort|next  a work list of samples (series --help)"},
    {"ports", cmd_ports, "ports                         list serial ports"},
    {"help", NULL, "help [COMMAND]                this list, or one command's options"},
};
#define N_COMMANDS (sizeof commands / sizeof commands[0])

static void usage(FILE *f)
{
	fprintf(f, "usage: stopcock COMMAND [ARGS]\n\ncommands:\n");
	for (size_t i = 0; i < N_COMMANDS; i++)
		fprintf(f, "  stopcock %s\n", commands[i].usage);
	fprintf(f, "\nclient commands take --url URL (default $STOPCOCK_URL or "
	           "http://127.0.0.1:8470)\nand --token-file F (default $STOPCOCK_TOKEN_FILE).\n");
}

/* An unknown command, with the near one when there is a single near one. */
static int unknown(const char *word)
{
	const char *names[N_COMMANDS + 1] = {NULL};
	for (size_t i = 0; i < N_COMMANDS; i++)
		names[i] = commands[i].name;
	const char *near = yt_closest(word, names);
	if (near)
		fprintf(stderr, "stopcock: unknown command '%s'; did you mean '%s'?\n\n", word,
		        near);
	else
		fprintf(stderr, "stopcock: unknown command '%s'\n\n", word);
	usage(stderr);
	return 2;
}

int main(int argc, char **argv)
{
	if (argc < 2 || !strcmp(argv[1], "-h") || !strcmp(argv[1], "--help")) {
		usage(argc < 2 ? stderr : stdout);
		return argc < 2 ? 2 : 0;
	}
	if (!strcmp(argv[1], "--version")) {
		printf("stopcock %s\n", STOPCOCK_VERSION);
		return 0;
	}
	if (!strcmp(argv[1], "help")) {
		if (argc < 3) {
			usage(stdout);
			return 0;
		}
		/* `stopcock help X` is `stopcock X --help`. */
		char *sub[] = {argv[2], "--help", NULL};
		for (size_t i = 0; i < N_COMMANDS; i++)
			if (commands[i].fn && !strcmp(argv[2], commands[i].name))
				return commands[i].fn(2, sub);
		return unknown(argv[2]);
	}
	for (size_t i = 0; i < N_COMMANDS; i++)
		if (commands[i].fn && !strcmp(argv[1], commands[i].name))
			return commands[i].fn(argc - 1, argv + 1);
	return unknown(argv[1]);
}
