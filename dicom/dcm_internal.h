/* dcm_internal.h: what the reader, the writer and the process-wide setup share inside dicom/. */
#ifndef DCM_INTERNAL_H
#define DCM_INTERNAL_H

#include <cstdarg>
#include <cstddef>

#include "dicom.h"

/* Our implementation class UID (2.25 scheme, generated once for slicewarden) and version name. */
#define DCM_IMPLEMENTATION_CLASS_UID "2.25.36046597318002096424841575946494753352"
#define DCM_IMPLEMENTATION_VERSION "SLICEWARDEN01"

/* The limit on NumberOfFrames we accept from a header: bounds the per-frame records allocated
 * before any pixel is read (about 3 kB each). */
#define DCM_MAX_FRAMES 100000
/* Decoded pixel data of one file, at most (stored values; the float copy is twice that for 16-bit
 * data). 256 MiB holds 128 frames of 1024 x 1024 or 2048 of 256 x 256 at 16 bits. */
#define DCM_MAX_PIXEL_BYTES (256 * 1048576)
/* A deflated data set, inflated, at most. Deflate is rare for images and DCMTK reads the inflated
 * data set whole; 64 MiB bounds what a small file can make the reader hold (a 337 kB file can
 * inflate to 330 MiB). */
#define DCM_MAX_INFLATED_BYTES (64 * 1048576)
/* Data elements and items in one file, at most. DCMTK spends about 3 us on each (an allocation
 * and a list insert): a 246 kB deflated file of zeros inflated to 2.5 million empty elements and
 * took 8 s to parse. An Enhanced MR file of 2048 frames holds about 80,000. */
#define DCM_MAX_ELEMENTS 300000
/* Sequences nest at most this deep (Enhanced MR needs 2, structured reports a dozen or two). */
#define DCM_MAX_DEPTH 128

/* 1 after a successful dcm_init, 0 before and after dcm_shutdown. */
int dcm_is_initialised(void);

/* Sets err to "dicom: <name>: <reason>"; returns st. */
sw_status dcm_fail(sw_error *err, sw_status st, const char *name, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

/* Copies src into dst (size n) as valid UTF-8: invalid bytes become '?', control characters
 * become spaces, leading and trailing spaces are dropped, and a cut never splits a character. */
void dcm_copy_text(char *dst, size_t n, const char *src);

#endif
