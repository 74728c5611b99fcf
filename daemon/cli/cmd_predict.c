/* cmd_predict.c: `stopcock predict METHOD.yaml --scenario S.yaml [--amount X]
 * [--seed N] [--calibration SLOPE_PCT,OFFSET_MV] [--json]`.
 *
 * Runs the method offline with the daemon's own engine against the simulated
 * beaker (simrun.h) on a virtual clock, and prints what the run would give:
 * endpoints, results, additions and the simulated duration; --json prints
 * the run record (record.h, the daemon's serializer) plus "duration_s" and,
 * as an addition, "points".
 *
 * --amount X is the sample amount in the method's unit; with unit mL it is
 * also the sample put in the beaker (the scenario's sample_ml otherwise).
 * With signal: ph the engine reads mV through a calibration equal to the
 * scenario's electrode unless --calibration gives another. The method's
 * before steps run first; each add takes its reagent from the scenario's
 * `dosers` entry of the doser's name (docs/chemistry.md), at that reagent's
 * molarity as add1_molarity and a titer of 1.
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "chem.h"
#include "scenario.h"
#include "cmd.h"
#include "diag.h"
#include "method.h"
#include "record.h"
#include "simrun.h"
#include "numparse.h"

static void usage(FILE *f)
{
	fprintf(f,
	        "usage: stopcock predict METHOD.yaml --scenario S.yaml [--amount X] [--seed N]\n"
	        "                        [--calibration SLOPE_PCT,OFFSET_MV] [--json]\n"
	        "  the method run against a simulated beaker on a virtual clock\n\n"
	        "options:\n"
	        "  --scenario S.yaml   the beaker: sample, titrant, electrode (docs/chemistry.md)\n"
	        "  --amount X          the sample amount in the method's sample unit (mL or g);\n"
	        "                      default: the scenario's sample_ml\n"
	        "  --seed N            the electrode noise's seed, a whole number (default 1)\n"
	        "  --calibration S,O   the electrode calibration the run uses: slope in %% of\n"
	        "                      Nernstian, offset in mV at pH 7 (default: the scenario's\n"
	        "                      electrode)\n"
	        "  --json              the run record and its points as JSON\n"
	        "  --help              this text\n"
	        "exit status: 0 finished, every result passes or has no limits; 1 failed;\n"
	        "2 bad arguments or files; 3 finished with a result outside its limits\n");
}

static void print_human(const method_t *m, const engine_t *e, const simrun_out_t *out,
                        const char *scenario, unsigned long long seed, double amount,
                        bool amount_given)
{
	printf("method %s (revision %ld) against %s, seed %llu\n", m->id, m->revision, scenario,
	       seed);
	/* Results scale with the amount, so say which one they are for; without
	 * --amount it is the scenario's sample volume, which a reader cannot guess. */
	printf("sample amount: %g %s (%s)\n", amount, method_unit_name(m->sample_unit),
	       amount_given ? "--amount" : "assumed: the scenario's sample_ml; give --amount");
	/* The before steps, as the beaker got them (endpoint volumes below are
	 * the burette's titrant only). */
	for (int i = 0; i < m->n_before; i++) {
		const method_step_t *st = &m->before[i];
		printf("%s", i ? ", " : "before: ");
		if (st->kind == STEP_ADD)
			printf("add %g mL from %s", st->ml, st->doser);
		else
			printf("%s %g", method_step_name(st->kind), st->s);
	}
	if (m->n_before > 0)
		printf(" (%.0f s)\n", out->steps_s);
	const char *unit = m->signal == SIGNAL_MV ? "mV" : "pH";
	int ne = engine_n_endpoints(e);
	if (ne == 0)
		printf("no endpoint found\n");
	for (int i = 0; i < ne; i++) {
		const engine_endpoint_t *ep = engine_endpoint(e, i);
		printf("endpoint %d: %.4f mL", ep->n, ep->volume_ml);
		if (isfinite(ep->u_volume_ml))
			printf(" (u %.4f mL)", ep->u_volume_ml);
		printf(" by %s", ep->how);
		if (ep->fallback)
			printf(" (fallback of detect criterion %d: no inflection before it)",
			       ep->criterion);
		if (strcmp(ep->how, "model") == 0)
			printf(" (derivative %.4f mL)", ep->deriv_ml);
		else if (isfinite(ep->model_ml))
			printf(" (model %.4f mL, not used)", ep->model_ml);
		if (m->signal == SIGNAL_MV)
			printf(", %.1f %s", ep->signal, unit);
		if (isfinite(ep->ph))
			printf(", pH %.2f", ep->ph);
		if (isfinite(ep->half_ph))
			printf(", pH %.2f at half volume", ep->half_ph);
		if (ep->doubt[0])
			printf("\n  doubtful: %s", ep->doubt);
		printf("\n");
	}
	for (int i = 0; i < engine_n_results(e); i++) {
		const engine_result_t *r = engine_result(e, i);
		if (r->has_value)
			printf("result %s: %.*f%s%s (%s%s%s)%s\n", r->name, r->decimals, r->value,
			       r->unit[0] ? " " : "", r->unit, engine_accept_name(r->accept),
			       r->note[0] ? ": " : "", r->note,
			       r->from_fallback ? " from a fallback endpoint" : "");
		else
			printf("result %s: none (%s)\n", r->name, r->note);
	}
	printf("additions: %d, dispensed %.4f mL, refills %d, points %d\n", engine_additions(e),
	       engine_dispensed_ml(e), engine_refills(e), engine_n_points(e));
	printf("outcome: %s, stopped: %s", engine_outcome_name(engine_outcome(e)),
	       engine_stop_name(engine_stop_reason(e)));
	if (engine_fault_code(e)[0])
		printf(" (%s: %s)", engine_fault_code(e), engine_fault_message(e));
	printf("\nsimulated duration: %.0f s (%.1f min)\n", out->duration_s,
	       out->duration_s / 60.0);
}

static int print_json(const method_t *m, const engine_t *e, const simrun_out_t *out,
                      const engine_params_t *p)
{
	run_record_t r;
	record_init(&r);
	record_set_method(&r, m);
	record_fill_from_engine(&r, e, "");
	snprintf(r.state, sizeof r.state, "%s", engine_outcome_name(engine_outcome(e)));
	r.sample.amount = p->amount;
	r.titrant.titer = p->titer;
	if (p->has_calibration) {
		r.has_calibration = true;
		r.calibration.slope_pct = p->cal_slope_pct;
		r.calibration.offset_mv = p->cal_offset_mv;
	}
	r.has_duration = true;
	r.duration_s = out->duration_s;
	json_t *j = record_to_json(&r);
	json_t *pts = json_array();
	if (!j || !pts) {
		json_decref(j);
		json_decref(pts);
		fprintf(stderr, "stopcock predict: out of memory\n");
		return 1;
	}
	for (int i = 0; i < engine_n_points(e); i++)
		json_array_append_new(pts, record_point_to_json(engine_point(e, i)));
	json_object_set_new(j, "points", pts);
	char *s = json_dumps(j, JSON_INDENT(2) | JSON_REAL_PRECISION(10));
	json_decref(j);
	if (!s) {
		fprintf(stderr, "stopcock predict: out of memory\n");
		return 1;
	}
	printf("%s\n", s);
	free(s);
	return 0;
}

int cmd_predict(int argc, char **argv)
{
	const char *method_path = NULL, *scenario_path = NULL;
	simrun_opts_t o = {.seed = 1, .burette_start_ml = -1};
	bool json = false;
	for (int i = 1; i < argc; i++) {
		const char *a = argv[i];
		bool has_val = i + 1 < argc;
		if (!strcmp(a, "--json")) {
			json = true;
		} else if (!strcmp(a, "-h") || !strcmp(a, "--help")) {
			usage(stdout);
			return 0;
		} else if (!strcmp(a, "--scenario") && has_val) {
			scenario_path = argv[++i];
		} else if (!strcmp(a, "--amount") && has_val) {
			if (!parse_decimal(argv[++i], &o.amount) || !(o.amount > 0)) {
				fprintf(stderr,
				        "stopcock predict: --amount must be a number > 0 "
				        "(got '%s')\n",
				        argv[i]);
				return 2;
			}
			o.has_amount = true;
		} else if (!strcmp(a, "--seed") && has_val) {
			char *end;
			errno = 0;
			unsigned long long v = strtoull(argv[++i], &end, 10);
			if (errno || end == argv[i] || *end || argv[i][0] == '-') {
				fprintf(stderr,
				        "stopcock predict: --seed must be a whole number "
				        ">= 0 (got '%s')\n",
				        argv[i]);
				return 2;
			}
			o.seed = v;
		} else if (!strcmp(a, "--calibration") && has_val) {
			char buf[128];
			snprintf(buf, sizeof buf, "%s", argv[++i]);
			char *comma = strchr(buf, ',');
			double slope = 0, off = 0;
			if (comma)
				*comma = '\0';
			if (!comma || !parse_decimal(buf, &slope) ||
			    !parse_decimal(comma + 1, &off) || !(slope > 0)) {
				fprintf(stderr,
				        "stopcock predict: --calibration wants SLOPE_PCT,"
				        "OFFSET_MV, e.g. 98.5,-4.2 (got '%s')\n",
				        argv[i]);
				return 2;
			}
			o.has_calibration = true;
			o.cal_slope_pct = slope;
			o.cal_offset_mv = off;
		} else if (a[0] == '-') {
			fprintf(stderr, "stopcock predict: unknown or incomplete option '%s'\n", a);
			usage(stderr);
			return 2;
		} else if (!method_path) {
			method_path = a;
		} else {
			fprintf(stderr, "stopcock predict: one method file only (got '%s')\n", a);
			return 2;
		}
	}
	if (!method_path || !scenario_path) {
		usage(stderr);
		return 2;
	}
	method_t m;
	chem_scenario_t s;
	diag_list_t d = DIAG_LIST_INIT;
	int bad = method_load(method_path, NULL, &m, &d);
	bad |= scenario_load(scenario_path, &s, &d);
	if (bad) {
		diag_print(&d, stderr);
		diag_free(&d);
		return 2;
	}
	diag_free(&d);
	char why[256];
	if (simrun_check(&m, &s, why, sizeof why) != 0) {
		fprintf(stderr, "%s: %s\n", scenario_path, why);
		return 2;
	}

	/* A method written for another titrant strength gives results off by
	 * the ratio, with nothing else looking wrong; 10 % is far outside any
	 * titer a standardization would accept, so it means another titrant. */
	double scn_mol_l = fabs(chem_titrant_acidity(&s)); /* mol/L of H+ or OH- */
	if (m.titrant_molarity > 0 &&
	    fabs(scn_mol_l - m.titrant_molarity) > 0.10 * m.titrant_molarity)
		fprintf(stderr,
		        "warning: the method's titrant (%s, %g mol/L) differs from the "
		        "scenario's (%g mol/L); results assume the method's\n",
		        m.titrant_name, m.titrant_molarity, scn_mol_l);

	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	if (!e) {
		fprintf(stderr, "stopcock predict: out of memory\n");
		return 1;
	}
	int rc = 0;
	if (json) {
		chem_scenario_t scn = s;
		if (o.has_amount && m.sample_unit == UNIT_ML)
			scn.sample_ml = o.amount;
		engine_params_t p;
		simrun_params(&m, &scn, &o, &p);
		rc = print_json(&m, e, &out, &p);
	} else {
		engine_params_t p;
		simrun_params(&m, &s, &o, &p);
		print_human(&m, e, &out, scenario_path, o.seed, p.amount, o.has_amount);
	}
	/* A warning the run raised about itself (the record lists it with the
	 * faults too): the method would behave so on the bench. */
	if (engine_warning_code(e)[0])
		fprintf(stderr, "warning: %s: %s\n", engine_warning_code(e),
		        engine_warning_message(e));
	if (out.stuck) {
		fprintf(stderr, "stopcock predict: the simulation did not finish (engine bug)\n");
		rc = 1;
	} else if (rc == 0 && !engine_outcome_clean(e)) {
		/* The same statuses as `stopcock wait` (docs/cli.md). */
		rc = engine_outcome(e) == ENGINE_OUTCOME_FINISHED ? 3 : 1;
		for (int i = 0; i < engine_n_results(e); i++)
			if (engine_result(e, i)->accept == ENGINE_ACCEPT_DOUBTFUL)
				rc = 1; /* someone must look, as for `wait` */
	}
	engine_free(e);
	return rc;
}
