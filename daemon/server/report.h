/* report.h: a run's one-page PDF report (GET /v1/runs/{id}/report.pdf,
 * docs/api.md): header, the curve with its derivative and endpoints as
 * vector graphics, endpoints with their uncertainty, results with limits
 * and verdicts, calibration, titer and blank with their dates, faults and
 * the review signature. Drawn with cairo and pango (report.c).
 */
#ifndef STOPCOCK_REPORT_H
#define STOPCOCK_REPORT_H

#include <jansson.h>
#include <stddef.h>

#include "method.h"

/* The PDF (malloc'd, *len bytes) of run record `rec` with its points
 * (GET /v1/runs/{id}/points' array) and, when known, the method revision
 * that ran (for the results' limits; may be NULL). lab: the lab's name
 * ("" for none). NULL when cairo fails or memory runs out. */
char *report_pdf(const json_t *rec, const json_t *points, const method_t *m, const char *lab,
                 size_t *len);

/* Free the font caches pango, cairo and fontconfig keep for the process
 * (once, at exit, when no report is being drawn), so a leak checker sees
 * only leaks of ours. */
void report_cleanup(void);

#endif
