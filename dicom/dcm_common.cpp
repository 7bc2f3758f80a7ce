/* dcm_common.cpp: process-wide DCMTK setup (log, dictionary, codecs), UIDs and message helpers. */
#include "dcm_internal.h"

#include <atomic>
#include <cerrno>
#include <cstdint>
#include <cstdio>
#include <cstring>
#include <ctime>
#include <fcntl.h>
#include <sys/random.h>
#include <unistd.h>

#include <dcmtk/config/osconfig.h>
#include <dcmtk/dcmdata/dcdict.h>
#include <dcmtk/dcmdata/dcrledrg.h>
#include <dcmtk/dcmdata/dcvr.h>
#include <dcmtk/dcmjpeg/djdecode.h>
#include <dcmtk/dcmjpls/djdecode.h>
#include <dcmtk/oflog/oflog.h>

static int initialised;

int dcm_is_initialised(void)
{
    return initialised;
}

sw_status dcm_fail(sw_error *err, sw_status st, const char *name, const char *fmt, ...)
{
    char reason[SW_ERROR_MAX];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(reason, sizeof reason, fmt, ap);
    va_end(ap);
    /* One line: DCMTK condition texts may carry newlines. */
    for (char *p = reason; *p; p++)
        if (*p == '\n' || *p == '\r')
            *p = ' ';
    return sw_error_set(err, st, "dicom: %s: %s", name && *name ? name : "(unnamed)", reason);
}

/* Length of the valid UTF-8 sequence starting at s (at most left bytes), 0 when invalid. */
static size_t utf8_seq(const unsigned char *s, size_t left)
{
    unsigned c = s[0];
    size_t len;
    unsigned min;
    if (c < 0x80)
        return 1;
    if (c >= 0xC2 && c <= 0xDF) {
        len = 2;
        min = 0x80;
    } else if (c >= 0xE0 && c <= 0xEF) {
        len = 3;
        min = 0x800;
    } else if (c >= 0xF0 && c <= 0xF4) {
        len = 4;
        min = 0x10000;
    } else {
        return 0;
    }
    if (len > left)
        return 0;
    unsigned cp = c & (0x7F >> len);
    for (size_t i = 1; i < len; i++) {
        if ((s[i] & 0xC0) != 0x80)
            return 0;
        cp = (cp << 6) | (s[i] & 0x3F);
    }
    if (cp < min || cp > 0x10FFFF || (cp >= 0xD800 && cp <= 0xDFFF))
        return 0;
    return len;
}

void dcm_copy_text(char *dst, size_t n, const char *src)
{
    if (n == 0)
        return;
    dst[0] = '\0';
    if (!src)
        return;
    const unsigned char *s = reinterpret_cast<const unsigned char *>(src);
    size_t left = strlen(src);
    while (left && (*s == ' ' || *s == '\t')) {
        s++;
        left--;
    }
    size_t k = 0;
    while (left) {
        size_t len = utf8_seq(s, left);
        const unsigned char *from = s;
        unsigned char repl;
        if (len == 0) {
            repl = '?';
            from = &repl;
            len = 1;
            s++;
            left--;
        } else {
            if (len == 1 && (*s < 0x20 || *s == 0x7F)) {
                repl = ' ';
                from = &repl;
            }
            s += len;
            left -= len;
        }
        if (k + len > n - 1)
            break; /* never split a character */
        memcpy(dst + k, from, len);
        k += len;
    }
    while (k && dst[k - 1] == ' ')
        k--;
    dst[k] = '\0';
}

sw_status dcm_init(sw_error *err)
{
    if (initialised)
        return SW_OK;
    OFLog::configure(OFLogger::OFF_LOG_LEVEL);
    /* A UN element whose VR the dictionary knows is read with that VR (PS3.5 6.2.2 lets a
     * receiver do so); otherwise e.g. Modality of a file written by a VR-less converter would
     * come back as bytes. */
    dcmEnableUnknownVRConversion.set(OFTrue);
    if (!dcmDataDict.isDictionaryLoaded())
        return sw_error_set(err, SW_EIO,
                            "dicom: the DICOM data dictionary is not loaded (install DCMTK's "
                            "dicom.dic or point DCMDICTPATH at it)");
    DcmRLEDecoderRegistration::registerCodecs();
    DJDecoderRegistration::registerCodecs();
    DJLSDecoderRegistration::registerCodecs();
    initialised = 1;
    return SW_OK;
}

void dcm_shutdown(void)
{
    if (!initialised)
        return;
    DJLSDecoderRegistration::cleanup();
    DJDecoderRegistration::cleanup();
    DcmRLEDecoderRegistration::cleanup();
    initialised = 0;
}

/* 16 random bytes: getrandom, then /dev/urandom; 0 on success. */
static int random_bytes(unsigned char *b, size_t n)
{
    size_t got = 0;
    while (got < n) {
        ssize_t r = getrandom(b + got, n - got, 0);
        if (r < 0) {
            if (errno == EINTR)
                continue;
            break;
        }
        got += static_cast<size_t>(r);
    }
    if (got == n)
        return 0;
    int fd = open("/dev/urandom", O_RDONLY | O_CLOEXEC);
    if (fd < 0)
        return -1;
    got = 0;
    while (got < n) {
        ssize_t r = read(fd, b + got, n - got);
        if (r <= 0) {
            if (r < 0 && errno == EINTR)
                continue;
            break;
        }
        got += static_cast<size_t>(r);
    }
    close(fd);
    return got == n ? 0 : -1;
}

/* splitmix64 step: the last resort when the kernel gives no randomness at all. */
static uint64_t mix64(uint64_t x)
{
    x += 0x9E3779B97F4A7C15ull;
    x = (x ^ (x >> 30)) * 0xBF58476D1CE4E5B9ull;
    x = (x ^ (x >> 27)) * 0x94D049BB133111EBull;
    return x ^ (x >> 31);
}

void dcm_new_uid(char *buf, const char *suffix_hint)
{
    (void)suffix_hint;
    int saved = errno;
    unsigned char b[16];
    if (random_bytes(b, sizeof b) != 0) {
        /* No kernel randomness: time, pid, a counter and an address, mixed. Unique per call. */
        static std::atomic<uint64_t> counter;
        struct timespec ts;
        clock_gettime(CLOCK_REALTIME, &ts);
        uint64_t hi = mix64(static_cast<uint64_t>(ts.tv_sec) * 1000000000ull +
                            static_cast<uint64_t>(ts.tv_nsec));
        uint64_t lo = mix64((static_cast<uint64_t>(getpid()) << 32) ^ ++counter ^
                            reinterpret_cast<uintptr_t>(&ts));
        for (int i = 0; i < 8; i++) {
            b[i] = static_cast<unsigned char>(hi >> (8 * i));
            b[8 + i] = static_cast<unsigned char>(lo >> (8 * i));
        }
    }
    /* RFC 4122 version 4, variant 1 (as PS3.5 B.2 asks of a UUID-derived UID). */
    b[6] = static_cast<unsigned char>((b[6] & 0x0F) | 0x40);
    b[8] = static_cast<unsigned char>((b[8] & 0x3F) | 0x80);
    unsigned __int128 v = 0;
    for (int i = 0; i < 16; i++)
        v = (v << 8) | b[i];
    char digits[40];
    int nd = 0;
    do {
        digits[nd++] = static_cast<char>('0' + static_cast<int>(v % 10));
        v /= 10;
    } while (v != 0);
    int k = 0;
    memcpy(buf, "2.25.", 5);
    k = 5;
    while (nd > 0)
        buf[k++] = digits[--nd];
    buf[k] = '\0';
    errno = saved;
}
