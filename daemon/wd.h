/* wd.h: the program's internal interface: subcommands and the log. */
#ifndef WD_H
#define WD_H

#include <stdarg.h>

/* Subcommands: argv[0] is the subcommand's name; return the process exit status. */
int wd_cmd_simulate(int argc, char **argv);
int wd_cmd_analyze(int argc, char **argv);
int wd_cmd_check(int argc, char **argv);
int wd_cmd_demo(int argc, char **argv);
int wd_cmd_export(int argc, char **argv);
int wd_cmd_report(int argc, char **argv);
int wd_cmd_watch(int argc, char **argv);
int wd_cmd_reanalyze(int argc, char **argv);
int wd_cmd_selftest(int argc, char **argv);

/* ---- log: to stderr in the foreground, syslog when wd_log_syslog(1); errno preserved ---- */
typedef enum wd_log_level { WD_LOG_DEBUG = 0, WD_LOG_INFO, WD_LOG_WARN, WD_LOG_ERROR } wd_log_level;
void wd_log_set_level(wd_log_level level);
void wd_log_syslog(int on);
void wd_log(wd_log_level level, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
#define wd_debug(...) wd_log(WD_LOG_DEBUG, __VA_ARGS__)
#define wd_info(...) wd_log(WD_LOG_INFO, __VA_ARGS__)
#define wd_warn(...) wd_log(WD_LOG_WARN, __VA_ARGS__)
#define wd_error(...) wd_log(WD_LOG_ERROR, __VA_ARGS__)

#endif
