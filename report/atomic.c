/* atomic.c: whole-or-nothing file output: temporary file beside the target, fsync, rename. */
#include <errno.h>
#include <fcntl.h>
#include <stdatomic.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include "report.h"

struct rp_atomic {
    int fd;
    int failed; /* a write failed: commit must not publish a partial file */
    char *path; /* target */
    char *tmp;  /* temporary file in the target's folder */
    char *dir;  /* the target's folder, for its fsync */
};

/* Distinguishes temporary names made by threads of one process within one clock tick. */
static atomic_uint tmp_counter;

static void atomic_free(rp_atomic *a)
{
    if (!a)
        return;
    free(a->path);
    free(a->tmp);
    free(a->dir);
    free(a);
}

/* Splits path into its folder ("." when it has none) and base name; both malloc'ed. */
static sw_status split_path(const char *path, char **dir, char **base)
{
    const char *slash = strrchr(path, '/');
    *dir = NULL;
    *base = NULL;
    if (!slash) {
        *dir = strdup(".");
        *base = strdup(path);
    } else if (slash == path) {
        *dir = strdup("/");
        *base = strdup(slash + 1);
    } else {
        *dir = strndup(path, (size_t)(slash - path));
        *base = strdup(slash + 1);
    }
    if (!*dir || !*base) {
        free(*dir);
        free(*base);
        *dir = *base = NULL;
        return SW_ENOMEM;
    }
    return SW_OK;
}

sw_status rp_atomic_open(const char *path, rp_atomic **out, sw_error *err)
{
    sw_status st = SW_OK;
    rp_atomic *a = NULL;
    char *base = NULL;
    int last_errno = 0;

    if (out)
        *out = NULL;
    if (!path || !out || !*path) {
        st = sw_error_set(err, SW_EINVAL, "report: atomic open: no path");
        goto out;
    }
    a = calloc(1, sizeof *a);
    if (!a) {
        st = sw_error_set(err, SW_ENOMEM, "report: %s: out of memory", path);
        goto out;
    }
    a->fd = -1;
    a->path = strdup(path);
    if (!a->path || split_path(path, &a->dir, &base) != SW_OK) {
        st = sw_error_set(err, SW_ENOMEM, "report: %s: out of memory", path);
        goto out;
    }
    if (!*base || strcmp(base, ".") == 0 || strcmp(base, "..") == 0) {
        st = sw_error_set(err, SW_EINVAL, "report: %s: not a file name", path);
        goto out;
    }
    /* Hidden name in the same folder (so rename stays on one file system); O_EXCL retries. */
    size_t cap = strlen(a->dir) + strlen(base) + 64;
    a->tmp = malloc(cap);
    if (!a->tmp) {
        st = sw_error_set(err, SW_ENOMEM, "report: %s: out of memory", path);
        goto out;
    }
    for (int attempt = 0; attempt < 64 && a->fd < 0; attempt++) {
        struct timespec ts;
        clock_gettime(CLOCK_REALTIME, &ts);
        unsigned k = atomic_fetch_add(&tmp_counter, 1u);
        snprintf(a->tmp, cap, "%s/.%s.%ld-%u-%lx.tmp", a->dir, base, (long)getpid(), k,
                 (unsigned long)ts.tv_nsec);
        a->fd = open(a->tmp, O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, 0666);
        if (a->fd < 0) {
            last_errno = errno;
            if (last_errno != EEXIST)
                break;
        }
    }
    if (a->fd < 0) {
        st = sw_error_set(err, SW_EIO, "report: %s: cannot create a temporary file in %s: %s", path,
                          a->dir, strerror(last_errno));
        goto out;
    }
    *out = a;
    a = NULL;
out:
    atomic_free(a);
    free(base);
    return st;
}

sw_status rp_atomic_write(rp_atomic *a, const void *buf, size_t n, sw_error *err)
{
    const unsigned char *p = buf;
    if (!a || a->fd < 0 || (n && !buf))
        return sw_error_set(err, SW_EINVAL, "report: atomic write: bad arguments");
    while (n > 0) {
        ssize_t k = write(a->fd, p, n);
        if (k < 0) {
            if (errno == EINTR)
                continue;
            a->failed = 1;
            return sw_error_set(err, SW_EIO, "report: %s: write failed: %s", a->path,
                                strerror(errno));
        }
        p += k;
        n -= (size_t)k;
    }
    return SW_OK;
}

sw_status rp_atomic_commit(rp_atomic *a, sw_error *err)
{
    sw_status st = SW_OK;
    int dfd = -1, renamed = 0;

    if (!a)
        return sw_error_set(err, SW_EINVAL, "report: atomic commit: no handle");
    if (a->failed) {
        st =
            sw_error_set(err, SW_EIO, "report: %s: not written (an earlier write failed)", a->path);
        goto out;
    }
    if (fsync(a->fd) != 0) {
        st = sw_error_set(err, SW_EIO, "report: %s: fsync failed: %s", a->path, strerror(errno));
        goto out;
    }
    int fd = a->fd;
    a->fd = -1;
    if (close(fd) != 0) {
        st = sw_error_set(err, SW_EIO, "report: %s: close failed: %s", a->path, strerror(errno));
        goto out;
    }
    if (rename(a->tmp, a->path) != 0) {
        st = sw_error_set(err, SW_EIO, "report: %s: cannot rename into place: %s", a->path,
                          strerror(errno));
        goto out;
    }
    renamed = 1;
    /* The rename is durable only once the folder is synced. Some file systems refuse a folder
     * fsync (EINVAL): the file is in place all the same. */
    dfd = open(a->dir, O_RDONLY | O_DIRECTORY | O_CLOEXEC);
    if (dfd < 0 || (fsync(dfd) != 0 && errno != EINVAL && errno != ENOTSUP))
        st = sw_error_set(err, SW_EIO, "report: %s: written, but syncing folder %s failed: %s",
                          a->path, a->dir, strerror(errno));
out:
    if (dfd >= 0)
        close(dfd);
    if (renamed)
        atomic_free(a);
    else
        rp_atomic_abort(a);
    return st;
}

void rp_atomic_abort(rp_atomic *a)
{
    if (!a)
        return;
    if (a->fd >= 0)
        close(a->fd);
    if (a->tmp)
        unlink(a->tmp);
    atomic_free(a);
}

sw_status rp_atomic_write_file(const char *path, const void *buf, size_t n, sw_error *err)
{
    rp_atomic *a = NULL;
    sw_status st = rp_atomic_open(path, &a, err);
    if (st == SW_OK)
        st = rp_atomic_write(a, buf, n, err);
    if (st == SW_OK) {
        st = rp_atomic_commit(a, err); /* frees a */
        a = NULL;
    }
    rp_atomic_abort(a);
    return st;
}
