/* files.h: listing the files under paths given on the command line. */
#ifndef WD_FILES_H
#define WD_FILES_H

#include <stddef.h>

#include "sw.h"

typedef struct wd_paths {
    char **v;
    size_t n, cap;
} wd_paths;

/* Appends every regular file under path (itself if a file; recursively if a folder, symbolic links
 * not followed inside folders), sorted by name. Hidden files (a name starting with '.') are skipped
 * inside folders. err names the path on failure. */
sw_status wd_paths_collect(wd_paths *p, const char *path, sw_error *err);
void wd_paths_free(wd_paths *p);

#endif
