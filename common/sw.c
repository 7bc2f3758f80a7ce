/* sw.c: status names, the error record and small checked helpers. */
#include "sw.h"

#include <stdint.h>
#include <stdio.h>
#include <string.h>

void sw_error_clear(sw_error *e)
{
    if (e) {
        e->status = SW_OK;
        e->msg[0] = '\0';
    }
}

sw_status sw_error_vset(sw_error *e, sw_status st, const char *fmt, va_list ap)
{
    if (e && e->status == SW_OK && st != SW_OK) {
        e->status = st;
        vsnprintf(e->msg, sizeof e->msg, fmt, ap);
    }
    return st;
}

sw_status sw_error_set(sw_error *e, sw_status st, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    sw_error_vset(e, st, fmt, ap);
    va_end(ap);
    return st;
}

const char *sw_status_name(sw_status st)
{
    switch (st) {
    case SW_OK: return "ok";
    case SW_EINVAL: return "invalid argument";
    case SW_ENOMEM: return "out of memory";
    case SW_EIO: return "i/o error";
    case SW_EFORMAT: return "malformed input";
    case SW_EUNSUPPORTED: return "unsupported";
    case SW_ENOTFOUND: return "not found";
    case SW_EDB: return "database error";
    case SW_EMEASURE: return "not measurable";
    case SW_EBUSY: return "busy";
    }
    return "unknown status";
}

size_t sw_strlcpy(char *dst, const char *src, size_t n)
{
    size_t len = src ? strlen(src) : 0;
    if (n == 0)
        return len;
    size_t k = len < n - 1 ? len : n - 1;
    if (k)
        memcpy(dst, src, k);
    dst[k] = '\0';
    return k;
}

int sw_mul_size(size_t a, size_t b, size_t *out)
{
    if (a != 0 && b > SIZE_MAX / a)
        return -1;
    *out = a * b;
    return 0;
}
