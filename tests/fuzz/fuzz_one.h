/* fuzz_one.h: one untrusted input through the daemon's path, for the libFuzzer target and the
 * replay driver. */
#ifndef FUZZ_ONE_H
#define FUZZ_ONE_H

#include <stddef.h>
#include <stdint.h>

#include "sw.h"

/* Once per process: dcm_init. Returns 0, or -1 with the reason in err. */
int fz_init(sw_error *err);

/* Reads data as a DICOM file (header only, then in full), builds the views the daemon builds for
 * the frames read (wd_measure: echoes, duplicates, wd_image_view), analyses them, formats the results as
 * JSON and text, and frees everything. Returns the status of the full read, or of the measurement
 * when the read succeeded (*was_read is then 1, else 0); err holds the message of a failure.
 * Nothing survives the call. */
sw_status fz_one(const uint8_t *data, size_t len, const char *name, int *was_read,
                 sw_error *err);

#endif
