/* datadir.h: where the shared data is (pump profiles, methods, scenarios,
 * the bench page), found at run time so that one build works from the
 * source tree and from any install prefix (docs/operations.md, "Install").
 *
 * In this order:
 *   1. the repository holding the running program, when it runs from its
 *      build folder (BUILD/bin/x or BUILD/san/bin/x): REPO/config;
 *   2. PREFIX/share/stopcock beside the program's PREFIX/bin or PREFIX/sbin
 *      (so `make install PREFIX=/usr` or a DESTDIR copy needs no rebuild);
 *   3. the folder compiled in (STOPCOCK_DATADIR, from the Makefile's DATADIR).
 * The current folder plays no part.
 */
#ifndef STOPCOCK_DATADIR_H
#define STOPCOCK_DATADIR_H

#include <stdbool.h>
#include <stddef.h>

/* The data folder into out (no trailing slash). *in_tree is set (when not
 * NULL) if it is a source tree's config/ folder, whose bench page is
 * elsewhere (daemon/server/www). Returns 0, or -1 when out is too small. */
int datadir_find(char *out, size_t cap, bool *in_tree);

/* The folder of the running program (realpath of /proc/self/exe without
 * its last component). Returns 0 or -1. */
int datadir_exe_dir(char *out, size_t cap);

#endif
