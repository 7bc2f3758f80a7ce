/* watch.h: the unattended service's internals: file ingest (names, hashes, moves), series assembly,
 * the store of measured series, and the alert runner. Shared by watch.c, ingest.c, store.c,
 * alert.c and reanalyze.c; not a library interface. */
#ifndef WD_WATCH_H
#define WD_WATCH_H

#include <limits.h>
#include <nettle/sha2.h>
#include <stdint.h>
#include <sys/types.h>
#include <time.h>

#include "config.h"
#include "db.h"
#include "dicom.h"
#include "files.h"
#include "pipeline.h"
#include "sw.h"

#define WD_HASH_MAX 72 /* "sha256:" + 64 hex digits + NUL */

/* ---- settings: the configuration with the phantom model and tolerances it names ---- */
typedef struct wd_settings {
    wd_config cfg;
    wd_tolerances tol;
    an_model model;
    an_params params;
    char hash[WD_HASH_MAX]; /* SHA-256 of the effective settings, stored with every run */
} wd_settings;
/* Loads path (NULL: built-in defaults), applies the command line's folder, database (NULL: keep)
 * and quiet period (< 0: keep), resolves the output folders and loads the model and tolerance
 * files. Refuses output folders inside the watch folder. On failure err names the file, the line
 * and the reason, and s is not to be used. */
sw_status wd_settings_load(const char *path, const char *folder, const char *database, double quiet,
                           wd_settings *s, sw_error *err);

/* ---- names ---- */

/* 1 when base (a file name without folder) is one that receivers and copiers use while a file is
 * still being written (dot-files, *.tmp, *.part, *.partial, NAME~, ...): such files are never
 * taken; their final name arrives by IN_MOVED_TO. */
int wd_name_is_temporary(const char *base);

/* wd_safe_component: files.h. */

/* The folder name of a series under archive/ and images/: DATE_NUMBER_UID, made safe. */
char *wd_series_dir_name(const char *date, int number, const char *uid, char *out, size_t n);

/* ---- content hash (SHA-256, FIPS 180-4; nettle's implementation) ---- */
typedef struct wd_sha256 {
    struct sha256_ctx ctx;
} wd_sha256;
void wd_sha256_init(wd_sha256 *s);
void wd_sha256_update(wd_sha256 *s, const void *data, size_t n);
void wd_sha256_final(wd_sha256 *s, unsigned char out[32]);
/* "sha256:<hex>" of n bytes. */
void wd_sha256_text(const void *data, size_t n, char out[WD_HASH_MAX]);

/* ---- reading a file whole ---- */
#define WD_MAX_FILE_BYTES ((int64_t)2 << 30) /* larger files are refused (2 GiB) */
typedef struct wd_blob {
    unsigned char *data; /* owned */
    size_t len;
    char hash[WD_HASH_MAX];
    struct timespec mtime, ctime;
} wd_blob;
/* Reads a regular file (symbolic links are not followed) into memory and hashes it. On success b
 * owns the bytes (wd_blob_free); on failure b is empty and err names the file and the reason:
 * SW_ENOTFOUND when it vanished, SW_EINVAL when it is not a regular file, SW_EUNSUPPORTED when it
 * is too large, SW_EIO otherwise (errno kept in *errno_out when not NULL). */
sw_status wd_blob_read(const char *path, wd_blob *b, int *errno_out, sw_error *err);
void wd_blob_free(wd_blob *b);
/* Hash of a file's content (same rules as wd_blob_read), without keeping the bytes. */
sw_status wd_file_hash(const char *path, char out[WD_HASH_MAX], sw_error *err);

/* ---- moves that never overwrite ---- */

/* Fault injection for tests: when set, every move takes the copy path as if the target were on
 * another file system (EXDEV). */
extern int wd_move_force_copy;

/* Picks a name in dir for base that neither exists nor has a "NAME.reason.txt" beside it: base,
 * then base.1, base.2, ... (dir is created with its parents when missing). out gets the full path.
 * Reservation is advisory: wd_move_noreplace refuses to overwrite in any case. */
sw_status wd_pick_target(const char *dir, const char *base, char *out, size_t n, sw_error *err);
/* Moves src to dst without ever replacing dst: renameat2(RENAME_NOREPLACE) on one file system
 * (link and unlink where that flag is unsupported), not followed by an fsync (a rename lost to a
 * power cut leaves src in place; the caller records the target first and moves again); across file
 * systems a copy into a temporary name in dst's folder, fsync, a no-replace link to dst, fsync of
 * the folder, and only then the unlink of src. SW_EBUSY when dst exists (pick another name); src is
 * intact on any failure. */
sw_status wd_move_noreplace(const char *src, const char *dst, sw_error *err);
/* Writes text atomically to path (temporary file, fsync, rename, fsync of the folder). */
sw_status wd_write_text_atomic(const char *path, const char *text, sw_error *err);
/* mkdir -p with mode 0775 (less the umask). */
sw_status wd_mkdirs(const char *dir, sw_error *err);
/* 1 when path is dir itself or inside it (lexically, after resolving both with realpath when they
 * exist). */
int wd_path_inside(const char *path, const char *dir);

/* ---- series classification ---- */
typedef enum wd_match {
    WD_MATCH_NONE = 0, /* not a phantom series by name */
    WD_MATCH_T1,       /* [match] t1 */
    WD_MATCH_T2,       /* [match] t2 */
    WD_MATCH_CONTENT,  /* unmatched, taken on content (by_content = yes) */
} wd_match;
/* Matches SeriesDescription and ProtocolName against the '|'-separated glob patterns of the
 * configuration; t1 first. */
wd_match wd_classify(const wd_config *c, const dcm_image *d);
/* The series_type stored with the series ("t1", "t2", "content"). */
const char *wd_match_name(wd_match m);
/* Echoes a series of this class is expected to have (1 for t1, 2 for t2, 0 when unknown). */
int wd_match_echoes(wd_match m);
/* The key that picks a tolerance set (wd_tolerances_for): "3d" for MRAcquisitionType 3D, else "t1"
 * or "t2", else "other" (only rules for any series type apply). */
const char *wd_tolerance_key(wd_match m, const dcm_image *d);

/* ---- the store of one measured series (store.c) ---- */

/* One annotated PNG written for a measured series. */
typedef struct wd_png {
    int echo, slice, image; /* echo number, slice ordinal, index into the echo's images */
    char path[PATH_MAX];
} wd_png;
#define WD_MAX_PNGS (WD_MAX_ECHOES * 4)

/* What the store needs to know of a series besides its images. */
typedef struct wd_series_ctx {
    int64_t series_id, scanner_id;
    const char *scanner_label; /* alias or station name, for labels and logs */
    const char *station;
    const char *images_dir; /* NULL or "": no PNGs */
    const char *config_hash;
    const char *tolerance_key;
    int alerts; /* 1: record an alert for every warn and fail row */
} wd_series_ctx;

typedef struct wd_store_result {
    int64_t run_id;
    db_verdict verdict;
    int n_rows, n_alerts;
    int n_pngs;
    wd_png png[WD_MAX_PNGS];
    char summary[1024]; /* the one log line's results part */
} wd_store_result;

/* Maps an analysis verdict to the store's. */
db_verdict wd_db_verdict(an_verdict v);

/* Row sink: flattening calls it once per db_measurement (tests collect them). */
typedef sw_status (*wd_row_fn)(void *ctx, const db_measurement *m, sw_error *err);
/* Flattens the results of every echo of m into measurement rows: slice thickness (corrected) and
 * its pieces, bar length difference, displacement and bar lengths per wedge slice, the ramp
 * displacement, the position model, pitch, SNR, noise and rotation. Values that were not measured
 * are unmeasurable rows with their reason, never a number. The method gives the warn limits (its
 * tolerance set) and which pieces exist (its phantom model). */
sw_status wd_flatten(const wd_measured *m, const wd_method *method, wd_row_fn fn, void *ctx,
                     sw_error *err);

/* Writes one series' results in the caller's open transaction: a run (done or failed), its rows,
 * alerts for warn and fail rows (when ctx->alerts), and PNGs (written before the rows, named by
 * run). m may be NULL with a failure reason: a failed run is recorded. Does not commit. */
sw_status wd_store_run(db *d, const wd_series_ctx *ctx, const wd_method *method,
                       const wd_measured *m, const char *fail_reason, wd_store_result *out,
                       sw_error *err);

/* ---- the alert runner (alert.c) ---- */
typedef struct wd_alerts wd_alerts;
typedef struct wd_alert_opts {
    const char *command; /* run with /bin/sh -c; NULL or "": alerts stay pending */
    double timeout_s;    /* a command running longer is killed (process group) */
    double retry_s;      /* a failed command is retried after this long */
    int max_attempts;    /* give up after this many failed attempts */
    int max_running;     /* commands running at once */
} wd_alert_opts;
/* Ownership: on success *out is a new runner the caller frees with wd_alerts_free (which kills and
 * reaps what still runs); on failure *out is NULL. opts is copied. */
sw_status wd_alerts_new(const wd_alert_opts *opts, wd_alerts **out, sw_error *err);
void wd_alerts_free(wd_alerts *a);
sw_status wd_alerts_configure(wd_alerts *a, const wd_alert_opts *opts, sw_error *err);
/* One step, never blocking: reaps finished commands and records the outcome, kills overdue ones,
 * starts the alerts that are due. Database contention is retried at the next step. */
void wd_alerts_step(wd_alerts *a, db *d);
/* How many commands run now, and seconds until the runner wants another step (or -1). */
int wd_alerts_running(const wd_alerts *a);
double wd_alerts_next_s(const wd_alerts *a);
/* Waits for the running commands (at most their time limit), recording the outcomes; with
 * start_new, first starts the alerts never tried (the end of --once). */
void wd_alerts_drain(wd_alerts *a, db *d, int start_new);
/* Counters for the summary. */
void wd_alerts_counts(const wd_alerts *a, int *started, int *ok, int *failed);

/* ---- time ---- */
double wd_now_mono(void); /* seconds, CLOCK_MONOTONIC */
double wd_now_real(void); /* seconds since the epoch */

#endif
