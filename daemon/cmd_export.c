/* cmd_export.c: `slicewarden export`: measurement rows as RFC 4180 CSV for accreditation, filtered
 * by scanner, acquisition period, metric and verdict; the database is opened read-only. Columns in
 * docs/export.md. */
#include <getopt.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "config.h"
#include "db.h"
#include "trends.h"
#include "wd.h"

/* The configuration (for the database and images paths) and the store, read-only. cfg is filled
 * with the defaults, then the file: the one given, else the default file when it exists. */
sw_status wd_open_store_ro(const char *config_path, const char *db_path, wd_config *cfg, db **out,
                           sw_error *err)
{
    sw_status rc;
    *out = NULL;
    wd_config_default(cfg);
    if (!config_path && access(WD_DEFAULT_CONFIG, F_OK) == 0)
        config_path = WD_DEFAULT_CONFIG;
    if (config_path && (rc = wd_config_load(cfg, config_path, err)) != SW_OK)
        return rc;
    if (db_path)
        sw_strlcpy(cfg->database, db_path, sizeof cfg->database);
    wd_config_resolve(cfg);
    return db_open(cfg->database, DB_OPEN_RO, out, err);
}

/* "YYYY", "YYYY-MM", "YYYY-MM-DD", optionally "THH", ":MM", ":SS": the prefixes the store's period
 * filter compares with acquired_at. */
int wd_iso_prefix_ok(const char *s)
{
    static const char pattern[] = "dddd-dd-ddTdd:dd:dd";
    size_t n = strlen(s);
    if (n != 4 && n != 7 && n != 10 && n != 13 && n != 16 && n != 19)
        return 0;
    for (size_t i = 0; i < n; i++) {
        if (pattern[i] == 'd' ? (s[i] < '0' || s[i] > '9') : s[i] != pattern[i])
            return 0;
    }
    /* Field ranges: month 01-12, day 01-31, hour 00-23, minute and second 00-59. */
    static const struct {
        size_t at;
        int lo, hi;
    } field[] = {{5, 1, 12}, {8, 1, 31}, {11, 0, 23}, {14, 0, 59}, {17, 0, 59}};
    for (size_t i = 0; i < sizeof field / sizeof field[0]; i++) {
        if (n < field[i].at + 2)
            break;
        int v = (s[field[i].at] - '0') * 10 + (s[field[i].at + 1] - '0');
        if (v < field[i].lo || v > field[i].hi)
            return 0;
    }
    return 1;
}

/* "pass,fail" into a mask of (1u << verdict); 0 and a message on an unknown name. */
unsigned wd_verdict_mask(const char *list, char *bad, size_t nbad)
{
    unsigned mask = 0;
    char buf[128];
    if (strlen(list) >= sizeof buf) {
        snprintf(bad, nbad, "verdict list too long");
        return 0;
    }
    sw_strlcpy(buf, list, sizeof buf);
    char *save = NULL;
    for (char *tok = strtok_r(buf, ",", &save); tok; tok = strtok_r(NULL, ",", &save)) {
        db_verdict v;
        if (db_verdict_parse(tok, &v) != 0) {
            snprintf(bad, nbad, "unknown verdict '%s' (pass, warn, fail, unmeasurable, info)", tok);
            return 0;
        }
        mask |= 1u << v;
    }
    if (!mask)
        snprintf(bad, nbad, "empty verdict list");
    return mask;
}

static void usage(FILE *f)
{
    fprintf(f,
            "usage: slicewarden export [-c FILE] [--db PATH] [--scanner STATION] [--from DATE]\n"
            "                          [--to DATE] [--metric NAME] [--verdict LIST] [--all-runs]\n"
            "                          [-o FILE]\n"
            "Writes the stored measurements as CSV (RFC 4180, UTF-8, CRLF, a header row; one row\n"
            "per measurement; columns in docs/export.md). The database is opened read-only.\n"
            "  -c, --config FILE  configuration naming the database (default %s)\n"
            "  --db PATH          the database (overrides the configuration)\n"
            "  --scanner STATION  only this StationName\n"
            "  --from DATE        acquired at or after DATE (ISO 8601: 2025, 2025-03, 2025-03-01)\n"
            "  --to DATE          acquired before DATE (exclusive: --to 2026 ends with 2025)\n"
            "  --metric NAME      only this metric (slice_thickness, bar_length_difference, ...)\n"
            "  --verdict LIST     only these verdicts, comma-separated (pass,warn,fail,\n"
            "                     unmeasurable,info)\n"
            "  --all-runs         every finished analysis run (default: each series' latest)\n"
            "  -o, --output FILE  write FILE atomically (default: standard output)\n"
            "Exit status: 0 written, 2 a usage, configuration or database error.\n",
            WD_DEFAULT_CONFIG);
}

int wd_cmd_export(int argc, char **argv)
{
    enum { O_DB = 256, O_SCANNER, O_FROM, O_TO, O_METRIC, O_VERDICT, O_ALL };
    static const struct option opts[] = {
        {"config", required_argument, NULL, 'c'},
        {"db", required_argument, NULL, O_DB},
        {"scanner", required_argument, NULL, O_SCANNER},
        {"from", required_argument, NULL, O_FROM},
        {"to", required_argument, NULL, O_TO},
        {"metric", required_argument, NULL, O_METRIC},
        {"verdict", required_argument, NULL, O_VERDICT},
        {"all-runs", no_argument, NULL, O_ALL},
        {"output", required_argument, NULL, 'o'},
        {"help", no_argument, NULL, 'h'},
        {NULL, 0, NULL, 0},
    };
    const char *config = NULL, *dbpath = NULL, *output = NULL;
    char bad[160];
    db_filter f;
    db_filter_init(&f);
    int c;
    optind = 1;
    while ((c = getopt_long(argc, argv, "c:o:h", opts, NULL)) != -1) {
        switch (c) {
        case 'c': config = optarg; break;
        case O_DB: dbpath = optarg; break;
        case O_SCANNER: f.station_name = optarg; break;
        case O_FROM:
        case O_TO:
            if (!wd_iso_prefix_ok(optarg)) {
                fprintf(stderr, "slicewarden export: '%s' is not an ISO 8601 date (2025-03-01)\n",
                        optarg);
                return 2;
            }
            if (c == O_FROM)
                f.from = optarg;
            else
                f.to = optarg;
            break;
        case O_METRIC: f.metric = optarg; break;
        case O_VERDICT:
            if (!(f.verdict_mask = wd_verdict_mask(optarg, bad, sizeof bad))) {
                fprintf(stderr, "slicewarden export: %s\n", bad);
                return 2;
            }
            break;
        case O_ALL: f.all_runs = 1; break;
        case 'o': output = optarg; break;
        case 'h': usage(stdout); return 0;
        default: usage(stderr); return 2;
        }
    }
    if (optind < argc) {
        fprintf(stderr, "slicewarden export: unexpected argument '%s'\n", argv[optind]);
        return 2;
    }
    if (f.from && f.to && strcmp(f.from, f.to) >= 0) {
        fprintf(stderr, "slicewarden export: --from %s is not before --to %s\n", f.from, f.to);
        return 2;
    }
    static wd_config cfg;
    db *d = NULL;
    sw_error err;
    sw_error_clear(&err);
    int status = 2;
    long rows = 0;
    if (wd_open_store_ro(config, dbpath, &cfg, &d, &err) != SW_OK)
        goto out;
    sw_status rc = output ? db_export_csv_file(d, &f, output, &rows, &err)
                          : db_export_csv(d, &f, stdout, &rows, &err);
    if (rc != SW_OK)
        goto out;
    status = 0;
    if (output)
        fprintf(stderr, "slicewarden export: %ld rows to %s\n", rows, output);
out:
    if (status != 0)
        fprintf(stderr, "slicewarden export: %s\n", err.msg[0] ? err.msg : "failed");
    db_close(d);
    return status;
}
