/* replay.c: feeds files (or every file of folders) through fz_one without libFuzzer, so committed
 * regression inputs are checked in every build. Fails on a crash or sanitizer report (the process
 * dies), on a failure whose message is empty, and on a read failure whose message does not name
 * the file; also fails when no input was found, so an emptied folder cannot pass. A folder may
 * hold expected.txt, one line per input: NAME STATUS [WORDS...] (STATUS the sw_status without
 * its SW_ prefix, e.g. EFORMAT or OK; WORDS, when given, must appear in the message): the outcome each fix
 * promised, checked too. Listed inputs that are missing fail.
 *   fuzz_replay PATH...   (files or folders; folders are read one level deep, names sorted) */
#include <dirent.h>
#include <errno.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#include "dicom.h"
#include "fuzz_one.h"

static int failures, inputs, passes;

/* The expectations of the folder being replayed (expected.txt). */
#define MAX_EXPECT 256
static struct expect {
    char name[256];
    char status[32];
    char words[256];
    int seen;
} expect[MAX_EXPECT];
static int n_expect;

static void load_expect(const char *dir)
{
    char path[4096], line[1024];
    snprintf(path, sizeof path, "%s/expected.txt", dir);
    FILE *f = fopen(path, "r");
    n_expect = 0;
    if (!f)
        return;
    while (fgets(line, sizeof line, f) && n_expect < MAX_EXPECT) {
        struct expect *e = &expect[n_expect];
        int used = 0;
        line[strcspn(line, "\n")] = '\0';
        if (line[0] == '#' || !line[0])
            continue;
        memset(e, 0, sizeof *e);
        if (sscanf(line, "%255s %31s %n", e->name, e->status, &used) < 2)
            continue;
        sw_strlcpy(e->words, line + used, sizeof e->words);
        n_expect++;
    }
    fclose(f);
}

/* The enum's name without SW_, as expected.txt writes it. */
static const char *status_id(sw_status st)
{
    switch (st) {
    case SW_OK: return "OK";
    case SW_EINVAL: return "EINVAL";
    case SW_ENOMEM: return "ENOMEM";
    case SW_EIO: return "EIO";
    case SW_EFORMAT: return "EFORMAT";
    case SW_EUNSUPPORTED: return "EUNSUPPORTED";
    case SW_ENOTFOUND: return "ENOTFOUND";
    case SW_EDB: return "EDB";
    case SW_EMEASURE: return "EMEASURE";
    case SW_EBUSY: return "EBUSY";
    }
    return "?";
}

static struct expect *expect_of(const char *base)
{
    for (int i = 0; i < n_expect; i++)
        if (!strcmp(expect[i].name, base))
            return &expect[i];
    return NULL;
}

/* Reads all of path into a new buffer the caller frees; NULL on failure (errno set). */
static unsigned char *slurp(const char *path, size_t *len)
{
    unsigned char *buf = NULL, *ret = NULL;
    FILE *f = fopen(path, "rb");
    long n;
    if (!f)
        goto out;
    if (fseek(f, 0, SEEK_END) != 0 || (n = ftell(f)) < 0 || fseek(f, 0, SEEK_SET) != 0)
        goto out;
    buf = malloc((size_t)n + 1); /* + 1: a zero-length file still gets a buffer */
    if (!buf)
        goto out;
    if (fread(buf, 1, (size_t)n, f) != (size_t)n)
        goto out;
    *len = (size_t)n;
    ret = buf;
    buf = NULL;
out:
    free(buf);
    if (f)
        fclose(f);
    return ret;
}

static void one(const char *path)
{
    size_t len = 0;
    unsigned char *buf = slurp(path, &len);
    sw_error err = {0};
    int was_read = 0;
    const char *base = strrchr(path, '/');
    base = base ? base + 1 : path;
    if (!buf) {
        fprintf(stderr, "FAIL %s: cannot read: %s\n", path, strerror(errno));
        failures++;
        return;
    }
    inputs++;
    sw_status st = fz_one(buf, len, base, &was_read, &err);
    struct expect *e = expect_of(base);
    if (e) {
        e->seen = 1;
        const char *name = status_id(st);
        if (strcmp(name, e->status) != 0 || (e->words[0] && !strstr(err.msg, e->words))) {
            fprintf(stderr, "FAIL %s: expected %s \"%s\", got %s: %s\n", base, e->status,
                    e->words, name, err.msg);
            failures++;
            free(buf);
            return;
        }
    }
    if (st == SW_OK) {
        printf("ok   %s: read and measured\n", base);
        passes++;
    } else if (!err.msg[0]) {
        fprintf(stderr, "FAIL %s: status %s without a message\n", base, sw_status_name(st));
        failures++;
    } else if (!was_read && !strstr(err.msg, base)) {
        fprintf(stderr, "FAIL %s: the message does not name the file: %s\n", base, err.msg);
        failures++;
    } else {
        printf("ok   %s: %s (%s)\n", base, err.msg, sw_status_name(st));
        passes++;
    }
    free(buf);
}

static int by_name(const struct dirent **a, const struct dirent **b)
{
    return strcmp((*a)->d_name, (*b)->d_name);
}

static int regular(const struct dirent *d)
{
    return d->d_name[0] != '.' && strcmp(d->d_name, "expected.txt") != 0;
}

int main(int argc, char **argv)
{
    sw_error err = {0};
    if (argc < 2) {
        fprintf(stderr, "usage: fuzz_replay PATH...\n");
        return 2;
    }
    if (fz_init(&err) != 0) {
        fprintf(stderr, "fuzz_replay: %s\n", err.msg);
        return 1;
    }
    for (int a = 1; a < argc; a++) {
        struct stat sb;
        if (stat(argv[a], &sb) != 0) {
            fprintf(stderr, "FAIL %s: %s\n", argv[a], strerror(errno));
            failures++;
            continue;
        }
        if (!S_ISDIR(sb.st_mode)) {
            one(argv[a]);
            continue;
        }
        load_expect(argv[a]);
        struct dirent **list = NULL;
        int n = scandir(argv[a], &list, regular, by_name);
        if (n < 0) {
            fprintf(stderr, "FAIL %s: %s\n", argv[a], strerror(errno));
            failures++;
            continue;
        }
        for (int i = 0; i < n; i++) {
            char path[4096];
            snprintf(path, sizeof path, "%s/%s", argv[a], list[i]->d_name);
            if (stat(path, &sb) == 0 && S_ISREG(sb.st_mode))
                one(path);
            free(list[i]);
        }
        free(list);
        for (int i = 0; i < n_expect; i++)
            if (!expect[i].seen) {
                fprintf(stderr, "FAIL %s/%s: listed in expected.txt but missing\n", argv[a],
                        expect[i].name);
                failures++;
            }
        n_expect = 0;
    }
    if (inputs == 0) {
        fprintf(stderr, "FAIL: no input found\n");
        failures++;
    }
    printf("%d passed, %d failed\n", passes, failures);
    dcm_shutdown();
    return failures ? 1 : 0;
}
