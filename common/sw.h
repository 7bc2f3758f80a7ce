/* sw.h: the project's one status enum, error record and version; shared by every library. */
#ifndef SW_H
#define SW_H

#include <stdarg.h>
#include <stddef.h>

#define SW_VERSION "0.1.0"

/* One status for the whole project. Results travel through out-parameters. */
typedef enum sw_status {
    SW_OK = 0,
    SW_EINVAL,       /* bad argument or usage */
    SW_ENOMEM,       /* allocation failed */
    SW_EIO,          /* file system or operating system call failed */
    SW_EFORMAT,      /* input is malformed: not DICOM, truncated, bad values */
    SW_EUNSUPPORTED, /* well-formed but not handled (JPEG 2000, not MR, ...) */
    SW_ENOTFOUND,    /* an expected object is absent */
    SW_EDB,          /* the store failed */
    SW_EMEASURE,     /* a measurement could not be made */
    SW_EBUSY,        /* resource locked; retry later */
} sw_status;

/* One line naming the object and the reason. The first failure wins: sw_error_set does nothing
 * when status is already set. A NULL sw_error * is accepted everywhere and ignored. */
#define SW_ERROR_MAX 512
typedef struct sw_error {
    sw_status status;
    char msg[SW_ERROR_MAX];
} sw_error;

void sw_error_clear(sw_error *e);
/* Sets e (if not already set) and returns st, so callers can write `return sw_error_set(...)`. */
sw_status sw_error_set(sw_error *e, sw_status st, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
sw_status sw_error_vset(sw_error *e, sw_status st, const char *fmt, va_list ap);
const char *sw_status_name(sw_status st);

/* Bounded string copy that always terminates (dst of size n > 0). Returns strlen(dst). */
size_t sw_strlcpy(char *dst, const char *src, size_t n);

/* Overflow-checked size arithmetic: returns 0 and sets *out on success, -1 on overflow. */
int sw_mul_size(size_t a, size_t b, size_t *out);

#endif
