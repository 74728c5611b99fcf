/* cmd.h: the `stopcock` subcommands, one file each (daemon/cmd_*.c).
 * Each takes the arguments after its name (argv[0] is the subcommand name)
 * and returns the process exit status: 0 success, 1 failure, 2 bad input or
 * invalid files (as `stopcock check` exits 2 on any error). */
#ifndef STOPCOCK_CMD_H
#define STOPCOCK_CMD_H

int cmd_check(int argc, char **argv);   /* cmd_check.c */
int cmd_curve(int argc, char **argv);   /* cmd_curve.c */
int cmd_predict(int argc, char **argv); /* cmd_predict.c */
int cmd_ports(int argc, char **argv);   /* cmd_ports.c */
int cmd_start(int argc, char **argv);   /* cmd_client.c: client commands over HTTP */
int cmd_status(int argc, char **argv);
int cmd_show(int argc, char **argv);
int cmd_wait(int argc, char **argv);
int cmd_abort(int argc, char **argv);
int cmd_halt(int argc, char **argv);
int cmd_resume(int argc, char **argv);
int cmd_calibrate(int argc, char **argv);
int cmd_titrants(int argc, char **argv); /* cmd_audit.c */
int cmd_events(int argc, char **argv);
int cmd_review(int argc, char **argv);  /* cmd_records.c */
int cmd_correct(int argc, char **argv); /* cmd_records.c */
int cmd_series(int argc, char **argv);  /* cmd_series.c */

#endif
