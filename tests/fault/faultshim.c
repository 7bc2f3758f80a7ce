/* faultshim.c: an LD_PRELOAD library for tests that makes the Nth call of one kind fail, so that a
 * sweep over N reaches every call site of that kind in a run of the program. A test facility, never
 * part of the program.
 *
 * Kinds and the calls each counts (only calls made after arming):
 *   malloc  malloc, calloc, realloc (size > 0), posix_memalign, aligned_alloc: NULL / ENOMEM
 *   write   write, pwrite, pwrite64, writev, pwritev, fwrite: -1 (fwrite: 0) with SW_FAULT_ERRNO
 *   fsync   fsync, fdatasync, syncfs: -1 with SW_FAULT_ERRNO
 *   rename  rename, renameat, renameat2, link, linkat: -1 with SW_FAULT_ERRNO
 *   open    open, open64, openat, openat64 (and their _2 variants) with O_WRONLY, O_RDWR or
 *           O_CREAT; fopen, fopen64 with a mode other than "r"/"rb": -1 (NULL) with SW_FAULT_ERRNO
 *   sqlite  sqlite3_step: counted only, never failed here (the store's own hook fails the Nth
 *           step with a proper error: SLICEWARDEN_TEST_DB_FAULT_AT, db/dbint.h)
 *
 * Environment (read once, at the first intercepted call):
 *   SW_FAULT_KIND   one of the kinds above; unset: nothing fails, calls are only counted
 *   SW_FAULT_N      the first call that fails (1-based, counted from arming)
 *   SW_FAULT_TIMES  how many calls fail from the Nth on (default 1; a full disk stays full for a
 *                   while: give more)
 *   SW_FAULT_ERRNO  ENOSPC (default), EIO, EDQUOT, ENOMEM, EACCES, EROFS or a number
 *   SW_FAULT_ARM    counting starts at the first open/openat/fopen of a path ending in this text
 *                   (for example the database, which the service opens once its settings are
 *                   read and the DICOM dictionary is loaded); unset: counting starts at once
 *   SW_FAULT_REPORT a file that gets, at exit, one line "KIND COUNT" per kind (calls after
 *                   arming) and "fired N" (faults injected): the sweep's sizes come from it
 *   SW_FAULT_BACKTRACE  1: each injected fault prints a backtrace on stderr (diagnosis)
 * Each injected fault says so on stderr: "faultshim: KIND call N fails (ERRNO)".
 *
 * The real functions come from dlsym(RTLD_NEXT); malloc's family from glibc's __libc_* entry points,
 * since dlsym itself allocates. Under AddressSanitizer (libasan preloaded first) the malloc kind
 * must not be used: ASan's allocator owns malloc. The other kinds chain behind ASan's interceptors. */
#ifndef _GNU_SOURCE
#define _GNU_SOURCE
#endif
#include <dlfcn.h>
#include <errno.h>
#include <execinfo.h>
#include <fcntl.h>
#include <stdarg.h>
#include <stdatomic.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/syscall.h>
#include <sys/types.h>
#include <sys/uio.h>
#include <unistd.h>

enum { K_MALLOC, K_WRITE, K_FSYNC, K_RENAME, K_OPEN, K_SQLITE, K_COUNT };
static const char *const KIND_NAMES[K_COUNT] = {"malloc", "write", "fsync",
                                                "rename", "open",  "sqlite"};

static int configured;     /* 0 unknown, 1 read */
static int want = -1;      /* the kind that fails, -1 none */
static long first_n;       /* first failing call */
static long times = 1;     /* failing calls */
static int fault_errno = ENOSPC;
static char arm_text[512]; /* "" : armed from the start */
static char report_path[4096];
static int backtraces;
static atomic_int armed;
static atomic_long counts[K_COUNT];
static atomic_long fired;
static __thread int inside; /* our own bookkeeping must not count itself */

/* Raw writes to stderr that never allocate nor come back here. */
static void say(const char *s)
{
    (void)syscall(SYS_write, 2, s, strlen(s));
}

static void say_num(long v)
{
    char buf[24];
    int k = (int)sizeof buf;
    buf[--k] = '\0';
    unsigned long u = v < 0 ? (unsigned long)-v : (unsigned long)v;
    do
        buf[--k] = (char)('0' + u % 10);
    while ((u /= 10) && k > 1);
    if (v < 0)
        buf[--k] = '-';
    say(buf + k);
}

static int errno_by_name(const char *s)
{
    static const struct {
        const char *name;
        int value;
    } names[] = {{"ENOSPC", ENOSPC}, {"EIO", EIO},     {"EDQUOT", EDQUOT}, {"ENOMEM", ENOMEM},
                 {"EACCES", EACCES}, {"EROFS", EROFS}, {"EPERM", EPERM},   {"EFBIG", EFBIG}};
    for (size_t i = 0; i < sizeof names / sizeof names[0]; i++)
        if (!strcmp(s, names[i].name))
            return names[i].value;
    int v = atoi(s);
    return v > 0 ? v : ENOSPC;
}

static void configure(void)
{
    if (configured)
        return;
    configured = 1; /* getenv does not allocate */
    const char *k = getenv("SW_FAULT_KIND");
    for (int i = 0; k && i < K_SQLITE; i++)
        if (!strcmp(k, KIND_NAMES[i]))
            want = i;
    const char *n = getenv("SW_FAULT_N");
    first_n = n ? atol(n) : 0;
    if (first_n <= 0)
        want = -1;
    const char *t = getenv("SW_FAULT_TIMES");
    if (t && atol(t) > 0)
        times = atol(t);
    const char *e = getenv("SW_FAULT_ERRNO");
    if (e && *e)
        fault_errno = errno_by_name(e);
    const char *a = getenv("SW_FAULT_ARM");
    if (a && *a && strlen(a) < sizeof arm_text)
        strcpy(arm_text, a);
    else
        atomic_store(&armed, 1);
    const char *r = getenv("SW_FAULT_REPORT");
    if (r && strlen(r) < sizeof report_path)
        strcpy(report_path, r);
    const char *b = getenv("SW_FAULT_BACKTRACE");
    backtraces = b && *b == '1';
}

static void maybe_arm(const char *path)
{
    if (atomic_load(&armed) || !path || !arm_text[0])
        return;
    size_t n = strlen(path), k = strlen(arm_text);
    if (n >= k && !memcmp(path + n - k, arm_text, k))
        atomic_store(&armed, 1);
}

/* Counts a call of kind k; 1 when this call is to fail (errno is then set). */
static int should_fail(int k)
{
    if (inside)
        return 0;
    configure();
    if (!atomic_load(&armed))
        return 0;
    long n = atomic_fetch_add(&counts[k], 1) + 1;
    if (k != want || n < first_n || n >= first_n + times)
        return 0;
    inside = 1;
    atomic_fetch_add(&fired, 1);
    say("faultshim: ");
    say(KIND_NAMES[k]);
    say(" call ");
    say_num(n);
    say(" fails (");
    say(k == K_MALLOC ? "ENOMEM" : strerrorname_np(fault_errno));
    say(")\n");
    if (backtraces) {
        void *frames[32];
        int nf = backtrace(frames, 32);
        backtrace_symbols_fd(frames, nf, 2);
    }
    inside = 0;
    errno = k == K_MALLOC ? ENOMEM : fault_errno;
    return 1;
}

__attribute__((destructor)) static void report(void)
{
    if (!report_path[0])
        return;
    inside = 1;
    int fd = (int)syscall(SYS_openat, AT_FDCWD, report_path, O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC,
                          0644);
    if (fd < 0)
        return;
    char line[64];
    for (int k = 0; k < K_COUNT; k++) {
        int len = snprintf(line, sizeof line, "%s %ld\n", KIND_NAMES[k], atomic_load(&counts[k]));
        (void)syscall(SYS_write, fd, line, (size_t)len);
    }
    int len = snprintf(line, sizeof line, "fired %ld\n", atomic_load(&fired));
    (void)syscall(SYS_write, fd, line, (size_t)len);
    (void)syscall(SYS_close, fd);
}

#define REAL(name, type)                                                                           \
    static type real_##name;                                                                       \
    if (!real_##name)                                                                              \
        real_##name = (type)dlsym(RTLD_NEXT, #name);

/* ---- malloc ---- */
extern void *__libc_malloc(size_t);
extern void *__libc_calloc(size_t, size_t);
extern void *__libc_realloc(void *, size_t);
extern void *__libc_memalign(size_t, size_t);

void *malloc(size_t n)
{
    if (should_fail(K_MALLOC))
        return NULL;
    return __libc_malloc(n);
}

void *calloc(size_t a, size_t b)
{
    if (should_fail(K_MALLOC))
        return NULL;
    return __libc_calloc(a, b);
}

void *realloc(void *p, size_t n)
{
    if (n > 0 && should_fail(K_MALLOC))
        return NULL;
    return __libc_realloc(p, n);
}

int posix_memalign(void **out, size_t align, size_t n)
{
    if (should_fail(K_MALLOC))
        return ENOMEM;
    void *p = __libc_memalign(align, n);
    if (!p)
        return ENOMEM;
    *out = p;
    return 0;
}

void *aligned_alloc(size_t align, size_t n)
{
    if (should_fail(K_MALLOC))
        return NULL;
    return __libc_memalign(align, n);
}

/* ---- write ---- */
typedef ssize_t (*write_fn)(int, const void *, size_t);
typedef ssize_t (*pwrite_fn)(int, const void *, size_t, off_t);
typedef ssize_t (*writev_fn)(int, const struct iovec *, int);
typedef ssize_t (*pwritev_fn)(int, const struct iovec *, int, off_t);
typedef size_t (*fwrite_fn)(const void *, size_t, size_t, FILE *);

ssize_t write(int fd, const void *buf, size_t n)
{
    REAL(write, write_fn)
    /* The terminal and the log are not storage: failing them tests nothing of interest. */
    if (fd > 2 && should_fail(K_WRITE))
        return -1;
    return real_write(fd, buf, n);
}

ssize_t pwrite(int fd, const void *buf, size_t n, off_t off)
{
    REAL(pwrite, pwrite_fn)
    if (should_fail(K_WRITE))
        return -1;
    return real_pwrite(fd, buf, n, off);
}

ssize_t pwrite64(int fd, const void *buf, size_t n, off_t off)
{
    REAL(pwrite64, pwrite_fn)
    if (should_fail(K_WRITE))
        return -1;
    return real_pwrite64(fd, buf, n, off);
}

ssize_t writev(int fd, const struct iovec *v, int n)
{
    REAL(writev, writev_fn)
    if (fd > 2 && should_fail(K_WRITE))
        return -1;
    return real_writev(fd, v, n);
}

ssize_t pwritev(int fd, const struct iovec *v, int n, off_t off)
{
    REAL(pwritev, pwritev_fn)
    if (should_fail(K_WRITE))
        return -1;
    return real_pwritev(fd, v, n, off);
}

size_t fwrite(const void *p, size_t size, size_t n, FILE *f)
{
    REAL(fwrite, fwrite_fn)
    if (f != stdout && f != stderr && should_fail(K_WRITE))
        return 0;
    return real_fwrite(p, size, n, f);
}

/* ---- fsync ---- */
typedef int (*fd_fn)(int);

int fsync(int fd)
{
    REAL(fsync, fd_fn)
    if (should_fail(K_FSYNC))
        return -1;
    return real_fsync(fd);
}

int fdatasync(int fd)
{
    REAL(fdatasync, fd_fn)
    if (should_fail(K_FSYNC))
        return -1;
    return real_fdatasync(fd);
}

int syncfs(int fd)
{
    REAL(syncfs, fd_fn)
    if (should_fail(K_FSYNC))
        return -1;
    return real_syncfs(fd);
}

/* ---- rename and link ---- */
typedef int (*rename_fn)(const char *, const char *);
typedef int (*renameat_fn)(int, const char *, int, const char *);
typedef int (*renameat2_fn)(int, const char *, int, const char *, unsigned);
typedef int (*linkat_fn)(int, const char *, int, const char *, int);

int rename(const char *a, const char *b)
{
    REAL(rename, rename_fn)
    if (should_fail(K_RENAME))
        return -1;
    return real_rename(a, b);
}

int renameat(int da, const char *a, int db, const char *b)
{
    REAL(renameat, renameat_fn)
    if (should_fail(K_RENAME))
        return -1;
    return real_renameat(da, a, db, b);
}

int renameat2(int da, const char *a, int db, const char *b, unsigned flags)
{
    REAL(renameat2, renameat2_fn)
    if (should_fail(K_RENAME))
        return -1;
    return real_renameat2(da, a, db, b, flags);
}

int link(const char *a, const char *b)
{
    REAL(link, rename_fn)
    if (should_fail(K_RENAME))
        return -1;
    return real_link(a, b);
}

int linkat(int da, const char *a, int db, const char *b, int flags)
{
    REAL(linkat, linkat_fn)
    if (should_fail(K_RENAME))
        return -1;
    return real_linkat(da, a, db, b, flags);
}

/* ---- open for writing ---- */
typedef int (*open_fn)(const char *, int, ...);
typedef int (*openat_fn)(int, const char *, int, ...);
typedef int (*open2_fn)(const char *, int);
typedef int (*openat2_fn)(int, const char *, int);
typedef FILE *(*fopen_fn)(const char *, const char *);

static int writes(int flags)
{
    return (flags & O_ACCMODE) != O_RDONLY || (flags & O_CREAT);
}

static mode_t mode_arg(int flags, va_list ap)
{
    return (flags & O_CREAT) || (flags & O_TMPFILE) == O_TMPFILE ? (mode_t)va_arg(ap, int) : 0;
}

#define OPEN_BODY(realname, ...)                                                                   \
    maybe_arm(path);                                                                               \
    if (writes(flags) && should_fail(K_OPEN))                                                      \
        return -1;                                                                                 \
    return realname(__VA_ARGS__);

int open(const char *path, int flags, ...)
{
    REAL(open, open_fn)
    va_list ap;
    va_start(ap, flags);
    mode_t mode = mode_arg(flags, ap);
    va_end(ap);
    OPEN_BODY(real_open, path, flags, mode)
}

int open64(const char *path, int flags, ...)
{
    REAL(open64, open_fn)
    va_list ap;
    va_start(ap, flags);
    mode_t mode = mode_arg(flags, ap);
    va_end(ap);
    OPEN_BODY(real_open64, path, flags, mode)
}

int openat(int dir, const char *path, int flags, ...)
{
    REAL(openat, openat_fn)
    va_list ap;
    va_start(ap, flags);
    mode_t mode = mode_arg(flags, ap);
    va_end(ap);
    OPEN_BODY(real_openat, dir, path, flags, mode)
}

int openat64(int dir, const char *path, int flags, ...)
{
    REAL(openat64, openat_fn)
    va_list ap;
    va_start(ap, flags);
    mode_t mode = mode_arg(flags, ap);
    va_end(ap);
    OPEN_BODY(real_openat64, dir, path, flags, mode)
}

int __open_2(const char *path, int flags)
{
    REAL(__open_2, open2_fn)
    OPEN_BODY(real___open_2, path, flags)
}

int __open64_2(const char *path, int flags)
{
    REAL(__open64_2, open2_fn)
    OPEN_BODY(real___open64_2, path, flags)
}

int __openat_2(int dir, const char *path, int flags)
{
    REAL(__openat_2, openat2_fn)
    OPEN_BODY(real___openat_2, dir, path, flags)
}

int __openat64_2(int dir, const char *path, int flags)
{
    REAL(__openat64_2, openat2_fn)
    OPEN_BODY(real___openat64_2, dir, path, flags)
}

static int mode_writes(const char *mode)
{
    return mode && (strchr(mode, 'w') || strchr(mode, 'a') || strchr(mode, '+'));
}

FILE *fopen(const char *path, const char *mode)
{
    REAL(fopen, fopen_fn)
    maybe_arm(path);
    if (mode_writes(mode) && should_fail(K_OPEN))
        return NULL;
    return real_fopen(path, mode);
}

FILE *fopen64(const char *path, const char *mode)
{
    REAL(fopen64, fopen_fn)
    maybe_arm(path);
    if (mode_writes(mode) && should_fail(K_OPEN))
        return NULL;
    return real_fopen64(path, mode);
}

/* ---- sqlite3_step: counted, so that a sweep knows how many steps a run makes ---- */
typedef struct sqlite3_stmt sqlite3_stmt;
typedef int (*step_fn)(sqlite3_stmt *);

int sqlite3_step(sqlite3_stmt *st)
{
    REAL(sqlite3_step, step_fn)
    (void)should_fail(K_SQLITE); /* never the kind that fails: want is not K_SQLITE */
    return real_sqlite3_step(st);
}
