/* rp_html_int.h: a growable text buffer with HTML escaping, shared by html.c and svg.c. */
#ifndef RP_HTML_INT_H
#define RP_HTML_INT_H

#include <stdarg.h>
#include <stddef.h>

/* A buffer that records its first allocation failure and ignores writes after it. */
typedef struct rp_buf {
    char *s;
    size_t len, cap;
    int failed;
} rp_buf;

void rp_buf_free(rp_buf *b);
void rp_buf_put(rp_buf *b, const char *s);
void rp_buf_putn(rp_buf *b, const char *s, size_t n);
void rp_buf_printf(rp_buf *b, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
/* s with & < > " ' escaped, for text and attribute values; NULL writes nothing. */
void rp_buf_esc(rp_buf *b, const char *s);
/* A number for an attribute or text: %.*g, "" for NAN. */
void rp_buf_num(rp_buf *b, double v, int digits);

#endif
