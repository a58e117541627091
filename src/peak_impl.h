/* Private interface of the peak module.  Not installed. */
#ifndef CLEF_PEAK_IMPL_H
#define CLEF_PEAK_IMPL_H

#include "clef/peak.h"

/* clef_peak_find without log messages (errors still set the last-error
 * message): for the forward model, which runs the estimator on many model
 * spectra and may do so from several threads. */
int clef_peak_find_quiet(const clef_bandpowers *bp, const clef_peak_opts *o, clef_peak_result *r);

#endif
