/* files.h: listing the files under paths given on the command line. */
#ifndef WD_FILES_H
#define WD_FILES_H

#include <stddef.h>

#include "sw.h"

typedef struct wd_paths {
    char **v;
    unsigned char *named; /* 1: the path was given itself, 0: found inside a folder */
    size_t n, cap;
} wd_paths;

/* Appends every regular file under path (itself if a file; recursively if a folder, symbolic links
 * not followed inside folders), sorted by name. Hidden files (a name starting with '.') are skipped
 * inside folders. err names the path on failure. */
sw_status wd_paths_collect(wd_paths *p, const char *path, sw_error *err);
void wd_paths_free(wd_paths *p);

/* Makes one safe path component of in: bytes other than [A-Za-z0-9._-] become '_', a leading '.'
 * or '-' becomes '_', the result is at most n - 1 bytes (n > 1) and never empty, "." or "..".
 * fallback is used when in is NULL or empty. Returns out. */
char *wd_safe_component(const char *in, const char *fallback, char *out, size_t n);

/* 1 when the file at path starts like a DICOM Part 10 file ("DICM" at offset 128), 0 otherwise. */
int wd_has_dicom_magic(const char *path);

/* Creates a folder and its missing parents (mode 0750); 0 on success, -1 with errno. */
int wd_mkdir_p(const char *path);

/* Removes path and, for a folder, everything below it (links removed, never followed); 0 on
 * success, -1 with errno at the first entry that could not be removed. */
int wd_remove_tree(const char *path);

#endif
