/* simrun.c: the engine against the simulated beaker on a virtual clock. */
#include "simrun.h"

#include <math.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "beaker.h"

void simrun_params(const method_t *m, const chem_scenario_t *s, const simrun_opts_t *o,
                   engine_params_t *p)
{
	memset(p, 0, sizeof *p);
	p->amount = o->has_amount ? o->amount : s->sample_ml;
	p->titer = o->titer > 0 ? o->titer : 1.0;
	p->has_blank = o->has_blank;
	p->blank_ml = o->blank_ml;
	if (o->has_calibration) {
		p->has_calibration = true;
		p->cal_slope_pct = o->cal_slope_pct;
		p->cal_offset_mv = o->cal_offset_mv;
	} else {
		p->has_calibration = true;
		p->cal_slope_pct = s->electrode.slope_pct;
		p->cal_offset_mv = s->electrode.offset_mv;
	}
	p->burette_capacity_ml = s->burette.capacity_ml;
	p->burette_steps = s->burette.steps;
	p->burette_content_ml = o->burette_start_ml;
	p->vessel_max_ml = o->vessel_max_ml;
	p->read_interval_s = o->read_interval_s;
	double sample_ml = s->sample_ml;
	if (o->has_amount && m->sample_unit == UNIT_ML)
		sample_ml = o->amount;
	p->start_volume_ml = sample_ml + s->water_ml;
	/* The additions as the before steps make them; the scenario's reagent
	 * is taken at its nominal molarity (a titer of 1). */
	for (int i = 0; i < METHOD_MAX_ADDS && i < FORMULA_MAX_ADD; i++) {
		const method_step_t *st = method_addition(m, i);
		if (!st)
			break;
		const chem_comp_t *r = chem_scenario_doser(s, st->doser);
		p->add_ml[i] = r ? st->ml : 0.0;
		p->add_molarity[i] = r ? r->molar : 0.0;
		p->add_titer[i] = 1.0;
		p->n_adds = i + 1;
		p->start_volume_ml += p->add_ml[i];
	}
}

int simrun_check(const method_t *m, const chem_scenario_t *s, char *msg, size_t msg_cap)
{
	for (int i = 0; i < m->n_before; i++) {
		const method_step_t *st = &m->before[i];
		if (st->kind == STEP_ADD && !chem_scenario_doser(s, st->doser)) {
			snprintf(
			    msg, msg_cap,
			    "before[%d] adds from dosing unit '%s', which the scenario does not "
			    "name (add it under dosers:)",
			    i + 1, st->doser);
			return -1;
		}
	}
	return 0;
}

/* The method's before steps in the beaker, on the virtual clock; returns
 * the time they took, s. */
static double run_before(const method_t *m, beaker_t *b, double cap_ml, double stroke_s)
{
	double t = 0;
	for (int i = 0; i < m->n_before; i++) {
		const method_step_t *st = &m->before[i];
		double dt = st->s;
		if (st->kind == STEP_ADD) {
			const chem_comp_t *r = chem_scenario_doser(beaker_scenario(b), st->doser);
			if (!r)
				continue;
			chem_comp_t reagent = *r; /* beaker_add_reagent changes the scenario */
			beaker_add_reagent(b, &reagent, st->ml);
			dt = fmax(0.2, stroke_s * st->ml / cap_ml);
		}
		beaker_advance(b, dt);
		t += dt;
	}
	return t;
}

/* Thread CPU time, s: the benchmark's CPU per point of the engine alone. The
 * engine itself never reads a clock; this wrapper does, outside it. */
static double cpu_s(void)
{
	struct timespec ts;
	clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
	return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

static engine_action_t feed(engine_t *e, const engine_event_t *ev, simrun_out_t *out)
{
	double t0 = cpu_s();
	engine_action_t a = engine_feed(e, ev);
	out->engine_cpu_s += cpu_s() - t0;
	out->events++;
	return a;
}

engine_t *simrun_run(const method_t *m, const chem_scenario_t *s, const simrun_opts_t *o,
                     simrun_out_t *out)
{
	chem_scenario_t scn = *s;
	if (o->has_amount && m->sample_unit == UNIT_ML && o->amount > 0)
		scn.sample_ml = o->amount;
	engine_params_t p;
	simrun_params(m, &scn, o, &p);
	memset(out, 0, sizeof *out);

	beaker_t *b = beaker_new(&scn, o->seed);
	engine_t *e = engine_new(m, &p);
	if (!b || !e) {
		beaker_free(b);
		engine_free(e);
		return NULL;
	}
	double cap_ml = scn.burette.capacity_ml > 0 ? scn.burette.capacity_ml : 10.0;
	long steps = scn.burette.steps > 0 ? scn.burette.steps : 20000;
	double res_ml = cap_ml / (double)steps;
	double content_ml = o->burette_start_ml >= 0 ? fmin(o->burette_start_ml, cap_ml) : cap_ml;
	double stroke_s = o->stroke_s > 0 ? o->stroke_s : 30.0;
	double refill_s = o->refill_s > 0 ? o->refill_s : 20.0;
	double total_ml = 0;
	out->steps_s = run_before(m, b, cap_ml, stroke_s);

	double t = 0;
	engine_event_t ev = {.kind = ENGINE_EV_START, .t_s = 0};
	engine_action_t a = feed(e, &ev, out);
	/* Loop guard: far more events than any sane run needs. */
	long guard = 2000000;
	while (a.kind != ENGINE_ACT_STOP) {
		if (--guard <= 0) {
			out->stuck = true;
			ev = (engine_event_t){.kind = ENGINE_EV_FAULT,
			                      .t_s = t,
			                      .code = "sim_stuck",
			                      .message =
			                          "the simulation loop guard stopped the run"};
			a = feed(e, &ev, out);
			break;
		}
		memset(&ev, 0, sizeof ev);
		switch (a.kind) {
		case ENGINE_ACT_STIR:
		case ENGINE_ACT_WAIT:
			if (a.until_t_s > t) {
				beaker_advance(b, a.until_t_s - t);
				t = a.until_t_s;
			}
			ev.kind = ENGINE_EV_TICK;
			break;
		case ENGINE_ACT_READ:
			if (a.until_t_s > t) {
				beaker_advance(b, a.until_t_s - t);
				t = a.until_t_s;
			}
			ev.kind = ENGINE_EV_READING;
			ev.mv = beaker_mv(b);
			ev.temperature_c = beaker_temperature_c(b);
			break;
		case ENGINE_ACT_DOSE: {
			/* The motor moves whole steps, and no more than the syringe holds. */
			double want = fmax(0.0, a.dose_ml);
			double ml = floor(want / res_ml + 0.5) * res_ml;
			if (ml > content_ml)
				ml = floor(content_ml / res_ml + 1e-9) * res_ml;
			double dt = fmax(0.2, stroke_s * ml / cap_ml);
			beaker_add_ml(b, ml);
			beaker_advance(b, dt);
			t += dt;
			content_ml -= ml;
			total_ml += ml;
			if (total_ml > out->max_dispensed_ml)
				out->max_dispensed_ml = total_ml;
			ev.kind = ENGINE_EV_DOSED;
			ev.dosed_ml = ml;
			break;
		}
		case ENGINE_ACT_REFILL:
			beaker_advance(b, refill_s);
			t += refill_s;
			content_ml = cap_ml;
			ev.kind = ENGINE_EV_REFILLED;
			break;
		case ENGINE_ACT_STOP:
			break;
		}
		ev.t_s = t;
		a = feed(e, &ev, out);
	}
	out->duration_s = out->steps_s + t;
	beaker_free(b);
	return e;
}
