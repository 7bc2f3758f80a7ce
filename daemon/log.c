/* log.c: the program's tiny log: levels, stderr or syslog, errno preserved. */
#include <errno.h>
#include <stdio.h>
#include <syslog.h>

#include "wd.h"

static wd_log_level min_level = WD_LOG_INFO;
static int use_syslog;

void wd_log_set_level(wd_log_level level) { min_level = level; }

void wd_log_syslog(int on)
{
    if (on && !use_syslog)
        openlog("slicewarden", LOG_PID, LOG_DAEMON);
    use_syslog = on;
}

void wd_log(wd_log_level level, const char *fmt, ...)
{
    static const char *const names[] = {"debug", "info", "warning", "error"};
    static const int prio[] = {LOG_DEBUG, LOG_INFO, LOG_WARNING, LOG_ERR};
    int saved = errno;
    if (level < min_level) {
        errno = saved;
        return;
    }
    va_list ap;
    va_start(ap, fmt);
    if (use_syslog) {
        vsyslog(prio[level], fmt, ap);
    } else {
        fprintf(stderr, "slicewarden: %s: ", names[level]);
        vfprintf(stderr, fmt, ap);
        fputc('\n', stderr);
    }
    va_end(ap);
    errno = saved;
}
