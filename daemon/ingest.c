/* ingest.c: what the watch loop does to a single file before any series logic: name rules, the
 * content hash, whole-file reads, safe folder names, moves that never overwrite, and the series
 * classification by name. */
#include <nettle/sha2.h>
#include "watch.h"

#include <ctype.h>
#include <errno.h>
#include <fcntl.h>
#include <fnmatch.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

int wd_move_force_copy;

/* ---- names ---- */

/* Suffixes of names under which receivers, browsers, copy tools and editors write a file before it
 * gets its final name (common practice, from memory: dcm4che's storescp writes NAME.part; WinSCP
 * .filepart; Chromium .crdownload; Firefox .part; rsync and many receivers a dot-file; editors
 * NAME~ and .swp). Compared without regard to case. */
static const char *const TEMP_SUFFIXES[] = {
    ".tmp",      ".temp",       ".part",       ".partial", ".filepart",  ".crdownload",
    ".download", ".incomplete", ".inprogress", ".writing", ".uploading", ".lock",
    ".swp",      ".swx",        ".!sync",      ".dcmtmp",  NULL,
};

int wd_name_is_temporary(const char *base)
{
    size_t len = base ? strlen(base) : 0;
    if (len == 0)
        return 1;
    if (base[0] == '.' || base[len - 1] == '~')
        return 1;
    if (!strncmp(base, "~$", 2)) /* office-style lock files */
        return 1;
    if (len > 1 && base[0] == '#' && base[len - 1] == '#') /* editor autosave */
        return 1;
    for (int i = 0; TEMP_SUFFIXES[i]; i++) {
        size_t k = strlen(TEMP_SUFFIXES[i]);
        if (len > k && !strcasecmp(base + len - k, TEMP_SUFFIXES[i]))
            return 1;
    }
    return 0;
}

/* ---- SHA-256 (FIPS 180-4), by nettle ---- */

void wd_sha256_init(wd_sha256 *s)
{
    sha256_init(&s->ctx);
}

void wd_sha256_update(wd_sha256 *s, const void *data, size_t n)
{
    sha256_update(&s->ctx, n, data);
}

void wd_sha256_final(wd_sha256 *s, unsigned char out[32])
{
    sha256_digest(&s->ctx, SHA256_DIGEST_SIZE, out);
}

static void hash_text(wd_sha256 *s, char out[WD_HASH_MAX])
{
    static const char hex[] = "0123456789abcdef";
    unsigned char dig[32];
    wd_sha256_final(s, dig);
    memcpy(out, "sha256:", 7);
    for (int i = 0; i < 32; i++) {
        out[7 + 2 * i] = hex[dig[i] >> 4];
        out[8 + 2 * i] = hex[dig[i] & 15];
    }
    out[71] = '\0';
}

void wd_sha256_text(const void *data, size_t n, char out[WD_HASH_MAX])
{
    wd_sha256 s;
    wd_sha256_init(&s);
    wd_sha256_update(&s, data, n);
    hash_text(&s, out);
}

/* ---- whole-file reads ---- */

static sw_status open_regular(const char *path, int *fd_out, struct stat *st, int *errno_out,
                              sw_error *err)
{
    *fd_out = -1;
    int fd = open(path, O_RDONLY | O_CLOEXEC | O_NOFOLLOW | O_NONBLOCK);
    if (fd < 0) {
        int e = errno;
        if (errno_out)
            *errno_out = e;
        if (e == ENOENT)
            return sw_error_set(err, SW_ENOTFOUND, "%s: vanished before it was read", path);
        if (e == ELOOP)
            return sw_error_set(err, SW_EINVAL, "%s: a symbolic link, not a file", path);
        return sw_error_set(err, SW_EIO, "%s: cannot open: %s", path, strerror(e));
    }
    if (fstat(fd, st) != 0 || !S_ISREG(st->st_mode)) {
        int e = errno;
        close(fd);
        if (errno_out)
            *errno_out = e;
        return sw_error_set(err, SW_EINVAL, "%s: not a regular file", path);
    }
    if ((int64_t)st->st_size > WD_MAX_FILE_BYTES) {
        close(fd);
        return sw_error_set(err, SW_EUNSUPPORTED, "%s: %lld bytes, more than the %lld accepted",
                            path, (long long)st->st_size, (long long)WD_MAX_FILE_BYTES);
    }
    *fd_out = fd;
    return SW_OK;
}

/* Ownership: on success b->data is a new buffer released by wd_blob_free; on failure b is empty. */
sw_status wd_blob_read(const char *path, wd_blob *b, int *errno_out, sw_error *err)
{
    sw_status rc = SW_OK;
    struct stat st;
    int fd = -1;
    unsigned char *data = NULL;
    size_t got = 0;
    memset(b, 0, sizeof *b);
    if (errno_out)
        *errno_out = 0;
    if ((rc = open_regular(path, &fd, &st, errno_out, err)) != SW_OK)
        goto out;
    size_t cap = (size_t)st.st_size;
    /* One byte more than the size says, so that a file still growing is noticed. */
    if (!(data = malloc(cap + 1))) {
        rc = sw_error_set(err, SW_ENOMEM, "%s: out of memory for %zu bytes", path, cap);
        goto out;
    }
    for (;;) {
        ssize_t r = read(fd, data + got, cap + 1 - got);
        if (r < 0 && errno == EINTR)
            continue;
        if (r < 0) {
            if (errno_out)
                *errno_out = errno;
            rc = sw_error_set(err, SW_EIO, "%s: read failed: %s", path, strerror(errno));
            goto out;
        }
        if (r == 0)
            break;
        got += (size_t)r;
        if (got > cap) {
            rc = sw_error_set(err, SW_EBUSY, "%s: grew while it was read", path);
            goto out;
        }
    }
    b->data = data;
    b->len = got;
    b->mtime = st.st_mtim;
    b->ctime = st.st_ctim;
    wd_sha256_text(data, got, b->hash);
    data = NULL;
out:
    if (fd >= 0)
        close(fd);
    free(data);
    return rc;
}

void wd_blob_free(wd_blob *b)
{
    if (!b)
        return;
    free(b->data);
    b->data = NULL;
    b->len = 0;
}

sw_status wd_file_hash(const char *path, char out[WD_HASH_MAX], sw_error *err)
{
    sw_status rc = SW_OK;
    struct stat st;
    int fd = -1;
    unsigned char buf[65536];
    wd_sha256 s;
    out[0] = '\0';
    if ((rc = open_regular(path, &fd, &st, NULL, err)) != SW_OK)
        return rc;
    wd_sha256_init(&s);
    for (;;) {
        ssize_t r = read(fd, buf, sizeof buf);
        if (r < 0 && errno == EINTR)
            continue;
        if (r < 0) {
            rc = sw_error_set(err, SW_EIO, "%s: read failed: %s", path, strerror(errno));
            goto out;
        }
        if (r == 0)
            break;
        wd_sha256_update(&s, buf, (size_t)r);
    }
    hash_text(&s, out);
out:
    close(fd);
    return rc;
}

/* ---- folders ---- */

sw_status wd_mkdirs(const char *dir, sw_error *err)
{
    char p[PATH_MAX];
    if (sw_strlcpy(p, dir, sizeof p) >= sizeof p - 1)
        return sw_error_set(err, SW_EINVAL, "%s: path too long", dir);
    size_t len = strlen(p);
    for (size_t i = 1; i <= len; i++) {
        if (p[i] != '/' && p[i] != '\0')
            continue;
        char keep = p[i];
        p[i] = '\0';
        if (mkdir(p, 0775) != 0 && errno != EEXIST)
            return sw_error_set(err, SW_EIO, "%s: cannot create: %s", p, strerror(errno));
        p[i] = keep;
    }
    struct stat st;
    if (stat(dir, &st) != 0 || !S_ISDIR(st.st_mode))
        return sw_error_set(err, SW_EIO, "%s: not a folder", dir);
    return SW_OK;
}

static void dir_of(const char *path, char *out, size_t n)
{
    sw_strlcpy(out, path, n);
    char *slash = strrchr(out, '/');
    if (!slash)
        sw_strlcpy(out, ".", n);
    else if (slash == out)
        out[1] = '\0';
    else
        *slash = '\0';
}

static const char *base_of(const char *path)
{
    const char *slash = strrchr(path, '/');
    return slash ? slash + 1 : path;
}

/* fsync of a folder, so that a rename or unlink in it survives a power loss. Best effort: some file
 * systems refuse fsync on folders, and the move has happened either way. */
static void sync_dir_of(const char *path)
{
    char dir[PATH_MAX];
    dir_of(path, dir, sizeof dir);
    int fd = open(dir, O_RDONLY | O_DIRECTORY | O_CLOEXEC);
    if (fd >= 0) {
        (void)fsync(fd);
        close(fd);
    }
}

int wd_path_inside(const char *path, const char *dir)
{
    char a[PATH_MAX], b[PATH_MAX];
    if (!realpath(path, a))
        sw_strlcpy(a, path, sizeof a);
    if (!realpath(dir, b))
        sw_strlcpy(b, dir, sizeof b);
    size_t la = strlen(a), lb = strlen(b);
    while (la > 1 && a[la - 1] == '/')
        a[--la] = '\0';
    while (lb > 1 && b[lb - 1] == '/')
        b[--lb] = '\0';
    if (strncmp(a, b, lb) != 0)
        return 0;
    return a[lb] == '\0' || a[lb] == '/' || (lb == 1 && b[0] == '/');
}

static int exists(const char *path)
{
    struct stat st;
    return lstat(path, &st) == 0 || errno != ENOENT;
}

sw_status wd_pick_target(const char *dir, const char *base, char *out, size_t n, sw_error *err)
{
    sw_status rc = wd_mkdirs(dir, err);
    if (rc != SW_OK)
        return rc;
    char name[256], reason[PATH_MAX + 16];
    wd_safe_component(base, "file", name, 200);
    for (int k = 0; k < 100000; k++) {
        int len =
            k ? snprintf(out, n, "%s/%s.%d", dir, name, k) : snprintf(out, n, "%s/%s", dir, name);
        if (len < 0 || (size_t)len >= n)
            return sw_error_set(err, SW_EINVAL, "%s/%s: path too long", dir, name);
        snprintf(reason, sizeof reason, "%s.reason.txt", out);
        if (!exists(out) && !exists(reason))
            return SW_OK;
    }
    return sw_error_set(err, SW_EIO, "%s: no free name for %s", dir, name);
}

/* Puts src at dst without replacing: 0, or -1 with errno (EEXIST when dst exists, EXDEV across file
 * systems). */
static int place_noreplace(const char *src, const char *dst)
{
    if (renameat2(AT_FDCWD, src, AT_FDCWD, dst, RENAME_NOREPLACE) == 0)
        return 0;
    if (errno != EINVAL && errno != ENOSYS && errno != ENOTSUP)
        return -1;
    /* The file system does not know RENAME_NOREPLACE: link fails on an existing name. */
    if (link(src, dst) == 0) {
        if (unlink(src) != 0) {
            int e = errno;
            (void)unlink(dst);
            errno = e;
            return -1;
        }
        return 0;
    }
    if (errno != EPERM && errno != ENOTSUP && errno != EOPNOTSUPP)
        return -1;
    /* No hard links either (vfat and the like): check, then rename. One writer owns these folders.
     */
    if (exists(dst)) {
        errno = EEXIST;
        return -1;
    }
    return rename(src, dst);
}

static sw_status copy_then_unlink(const char *src, const char *dst, sw_error *err)
{
    sw_status rc = SW_OK;
    int in = -1, outfd = -1, made = 0;
    char tmp[PATH_MAX], dir[PATH_MAX];
    unsigned char buf[65536];
    struct stat st;
    dir_of(dst, dir, sizeof dir);
    if (snprintf(tmp, sizeof tmp, "%s/.%s.swpart", dir, base_of(dst)) >= (int)sizeof tmp)
        return sw_error_set(err, SW_EINVAL, "%s: path too long", dst);
    if (lstat(src, &st) == 0 && S_ISLNK(st.st_mode)) {
        /* A symbolic link moves as a link (the watch folder records links, never follows them). */
        char target[PATH_MAX];
        ssize_t n = readlink(src, target, sizeof target - 1);
        if (n < 0)
            return sw_error_set(err, errno == ENOENT ? SW_ENOTFOUND : SW_EIO, "%s: %s", src,
                                strerror(errno));
        target[n] = '\0';
        (void)unlink(tmp); /* a leftover of a killed move */
        if (symlink(target, tmp) != 0)
            return sw_error_set(err, SW_EIO, "%s: cannot create: %s", tmp, strerror(errno));
        if (place_noreplace(tmp, dst) != 0) {
            int e = errno;
            (void)unlink(tmp);
            return e == EEXIST ? sw_error_set(err, SW_EBUSY, "%s: exists", dst)
                               : sw_error_set(err, SW_EIO, "%s: cannot create: %s", dst, strerror(e));
        }
        sync_dir_of(dst);
        if (unlink(src) != 0)
            return sw_error_set(err, SW_EIO, "%s: copied to %s but cannot remove: %s", src, dst,
                                strerror(errno));
        sync_dir_of(src);
        return SW_OK;
    }
    if ((in = open(src, O_RDONLY | O_CLOEXEC | O_NOFOLLOW)) < 0 || fstat(in, &st) != 0) {
        rc = sw_error_set(err, errno == ENOENT ? SW_ENOTFOUND : SW_EIO, "%s: cannot open: %s", src,
                          strerror(errno));
        goto out;
    }
    /* The temporary name is ours (hidden, derived from the target): a leftover of a killed copy is
     * simply truncated and reused. */
    outfd = open(tmp, O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC | O_NOFOLLOW, st.st_mode & 0777);
    if (outfd < 0) {
        rc = sw_error_set(err, SW_EIO, "%s: cannot create: %s", tmp, strerror(errno));
        goto out;
    }
    made = 1;
    for (;;) {
        ssize_t r = read(in, buf, sizeof buf);
        if (r < 0 && errno == EINTR)
            continue;
        if (r < 0) {
            rc = sw_error_set(err, SW_EIO, "%s: read failed: %s", src, strerror(errno));
            goto out;
        }
        if (r == 0)
            break;
        for (ssize_t off = 0; off < r;) {
            ssize_t w = write(outfd, buf + off, (size_t)(r - off));
            if (w < 0 && errno == EINTR)
                continue;
            if (w < 0) {
                rc = sw_error_set(err, SW_EIO, "%s: write failed: %s", tmp, strerror(errno));
                goto out;
            }
            off += w;
        }
    }
    const struct timespec times[2] = {st.st_atim, st.st_mtim};
    (void)futimens(outfd, times);
    if (fsync(outfd) != 0) {
        rc = sw_error_set(err, SW_EIO, "%s: fsync failed: %s", tmp, strerror(errno));
        goto out;
    }
    if (close(outfd) != 0) {
        outfd = -1;
        rc = sw_error_set(err, SW_EIO, "%s: close failed: %s", tmp, strerror(errno));
        goto out;
    }
    outfd = -1;
    if (place_noreplace(tmp, dst) != 0) {
        rc = errno == EEXIST
                 ? sw_error_set(err, SW_EBUSY, "%s: exists", dst)
                 : sw_error_set(err, SW_EIO, "%s: cannot create: %s", dst, strerror(errno));
        goto out;
    }
    made = 0;
    sync_dir_of(dst);
    /* The copy is durable: only now may the original go. */
    if (unlink(src) != 0) {
        rc = sw_error_set(err, SW_EIO, "%s: copied to %s but cannot remove: %s", src, dst,
                          strerror(errno));
        goto out;
    }
    sync_dir_of(src);
out:
    if (in >= 0)
        close(in);
    if (outfd >= 0)
        close(outfd);
    if (made)
        (void)unlink(tmp);
    return rc;
}

sw_status wd_move_noreplace(const char *src, const char *dst, sw_error *err)
{
    if (!wd_move_force_copy) {
        /* A rename is atomic; no fsync of the folders: a rename lost to a power cut leaves the
         * file where it was, and the caller's record (the target is stored before the move) makes
         * it move again. An fsync per file would cost more than everything else in ingest. */
        if (place_noreplace(src, dst) == 0)
            return SW_OK;
        if (errno == EEXIST)
            return sw_error_set(err, SW_EBUSY, "%s: exists", dst);
        if (errno == ENOENT && !exists(src))
            return sw_error_set(err, SW_ENOTFOUND, "%s: vanished", src);
        if (errno != EXDEV)
            return sw_error_set(err, SW_EIO, "%s: cannot move to %s: %s", src, dst,
                                strerror(errno));
    }
    return copy_then_unlink(src, dst, err);
}

sw_status wd_write_text_atomic(const char *path, const char *text, sw_error *err)
{
    sw_status rc = SW_OK;
    char tmp[PATH_MAX], dir[PATH_MAX];
    dir_of(path, dir, sizeof dir);
    if (snprintf(tmp, sizeof tmp, "%s/.%s.swtmp", dir, base_of(path)) >= (int)sizeof tmp)
        return sw_error_set(err, SW_EINVAL, "%s: path too long", path);
    int fd = open(tmp, O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC | O_NOFOLLOW, 0666);
    if (fd < 0)
        return sw_error_set(err, SW_EIO, "%s: cannot create: %s", tmp, strerror(errno));
    size_t n = strlen(text);
    for (size_t off = 0; off < n;) {
        ssize_t w = write(fd, text + off, n - off);
        if (w < 0 && errno == EINTR)
            continue;
        if (w < 0) {
            rc = sw_error_set(err, SW_EIO, "%s: write failed: %s", tmp, strerror(errno));
            goto out;
        }
        off += (size_t)w;
    }
    if (fsync(fd) != 0) {
        rc = sw_error_set(err, SW_EIO, "%s: fsync failed: %s", tmp, strerror(errno));
        goto out;
    }
out:
    if (close(fd) != 0 && rc == SW_OK)
        rc = sw_error_set(err, SW_EIO, "%s: close failed: %s", tmp, strerror(errno));
    if (rc == SW_OK && rename(tmp, path) != 0)
        rc = sw_error_set(err, SW_EIO, "%s: cannot rename into place: %s", path, strerror(errno));
    if (rc != SW_OK)
        (void)unlink(tmp);
    else
        sync_dir_of(path);
    return rc;
}

/* ---- classification ---- */

static int any_pattern(const char *patterns, const char *value)
{
    char buf[256];
    if (!value || !*value || !patterns || !*patterns)
        return 0;
    sw_strlcpy(buf, patterns, sizeof buf);
    char *save = NULL;
    for (char *p = strtok_r(buf, "|", &save); p; p = strtok_r(NULL, "|", &save)) {
        while (*p == ' ')
            p++;
        size_t len = strlen(p);
        while (len && p[len - 1] == ' ')
            p[--len] = '\0';
        if (*p && fnmatch(p, value, 0) == 0)
            return 1;
    }
    return 0;
}

wd_match wd_classify(const wd_config *c, const dcm_image *d)
{
    if (any_pattern(c->t1_match, d->series_description) ||
        any_pattern(c->t1_match, d->protocol_name))
        return WD_MATCH_T1;
    if (any_pattern(c->t2_match, d->series_description) ||
        any_pattern(c->t2_match, d->protocol_name))
        return WD_MATCH_T2;
    return c->match_by_content ? WD_MATCH_CONTENT : WD_MATCH_NONE;
}

const char *wd_match_name(wd_match m)
{
    switch (m) {
    case WD_MATCH_T1: return "t1";
    case WD_MATCH_T2: return "t2";
    case WD_MATCH_CONTENT: return "content";
    case WD_MATCH_NONE: break;
    }
    return "none";
}

int wd_match_echoes(wd_match m)
{
    return m == WD_MATCH_T1 ? 1 : m == WD_MATCH_T2 ? 2 : 0;
}

const char *wd_tolerance_key(wd_match m, const dcm_image *d)
{
    if (d && !strcasecmp(d->mr_acquisition_type, "3D"))
        return "3d";
    return m == WD_MATCH_T1 ? "t1" : m == WD_MATCH_T2 ? "t2" : "other";
}

/* ---- time ---- */

double wd_now_mono(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

double wd_now_real(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}
