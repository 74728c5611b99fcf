/* sim_balance.c: the simulated balance (see sim.h). It speaks
 * config/balances/sim.yaml's protocol on its own pseudo-terminal: WEIGH is
 * answered SETTLING while the pan swings, then STABLE with the weight in
 * grams to 0.1 mg. */
#include <stdio.h>
#include <string.h>

#include "sim.h"

bool sim_balance_command(sim_t *s, const char *line, char *reply, size_t cap)
{
	if (s->fault == SIM_FAULT_MUTE_BALANCE || s->fault == SIM_FAULT_UNPLUG)
		return false;
	sim_balance_t *b = &s->balance;
	if (s->fault == SIM_FAULT_BALANCE_GARBAGE) {
		/* Bytes no pattern of the profile matches, as a line at the wrong baud. */
		snprintf(reply, cap, "#~\\x7f?9.@1 %%q");
		return true;
	}
	if (strcmp(line, "WEIGH") != 0) {
		snprintf(reply, cap, "FAULT 1 unknown command");
		return true;
	}
	if (b->settle_left > 0) {
		b->settle_left--;
		snprintf(reply, cap, "SETTLING");
		return true;
	}
	b->settle_left = b->settle; /* the next weighing swings again */
	double g = b->fixed_g;
	long p = s->changer.present ? s->changer.pos : 0;
	if (p >= 1 && p <= SIM_RACK_POSITIONS && b->weight_g[p] > 0)
		g = b->weight_g[p];
	snprintf(reply, cap, "STABLE %.4f g", g);
	return true;
}
