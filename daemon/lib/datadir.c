/* datadir.c: see datadir.h. */
#include "datadir.h"

#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#ifndef STOPCOCK_DATADIR
#define STOPCOCK_DATADIR "/usr/local/share/stopcock"
#endif

static bool is_dir(const char *p)
{
	struct stat st;
	return stat(p, &st) == 0 && S_ISDIR(st.st_mode);
}

int datadir_exe_dir(char *out, size_t cap)
{
	char exe[PATH_MAX];
	ssize_t n = readlink("/proc/self/exe", exe, sizeof exe - 1);
	char *slash;

	if (n <= 0)
		return -1;
	exe[n] = '\0';
	slash = strrchr(exe, '/');
	if (!slash || slash == exe)
		return -1;
	*slash = '\0';
	return snprintf(out, cap, "%s", exe) < (int)cap ? 0 : -1;
}

static int put(char *out, size_t cap, const char *dir, const char *tail)
{
	char real[PATH_MAX], joined[PATH_MAX + 64];

	snprintf(joined, sizeof joined, "%s%s", dir, tail);
	/* realpath: messages and written configs show /usr/share/..., not bin/../ */
	if (!realpath(joined, real))
		return -1;
	return snprintf(out, cap, "%s", real) < (int)cap ? 0 : -1;
}

int datadir_find(char *out, size_t cap, bool *in_tree)
{
	/* Tree first: a program in BUILD/bin or BUILD/san/bin (or the unit test
	 * binary in BUILD/san) of a checkout, known by its sim profile and its
	 * daemon sources; an install is never laid out like that. */
	static const char *const tree[] = {"/../..", "/../../..", "/.."};
	char exe_dir[PATH_MAX];

	if (in_tree)
		*in_tree = false;
	if (datadir_exe_dir(exe_dir, sizeof exe_dir) == 0) {
		for (size_t i = 0; i < sizeof tree / sizeof tree[0]; i++) {
			char probe[PATH_MAX + 64], src[PATH_MAX + 64];
			snprintf(probe, sizeof probe, "%s%s/config/pumps/sim.yaml", exe_dir,
			         tree[i]);
			snprintf(src, sizeof src, "%s%s/daemon/server", exe_dir, tree[i]);
			if (access(probe, R_OK) == 0 && is_dir(src)) {
				char sub[32];
				snprintf(sub, sizeof sub, "%s/config", tree[i]);
				if (put(out, cap, exe_dir, sub) == 0) {
					if (in_tree)
						*in_tree = true;
					return 0;
				}
			}
		}
		/* Installed: PREFIX/bin/x or PREFIX/sbin/x beside PREFIX/share/stopcock. */
		char share[PATH_MAX + 32];
		snprintf(share, sizeof share, "%s/../share/stopcock", exe_dir);
		if (is_dir(share) && put(out, cap, exe_dir, "/../share/stopcock") == 0)
			return 0;
	}
	return snprintf(out, cap, "%s", STOPCOCK_DATADIR) < (int)cap ? 0 : -1;
}
