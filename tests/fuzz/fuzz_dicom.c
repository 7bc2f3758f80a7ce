/* fuzz_dicom.c: the libFuzzer entry points over fz_one (built with -DSW_FUZZ=ON and clang). */
#include <stdio.h>
#include <stdlib.h>

#include "fuzz_one.h"

int LLVMFuzzerInitialize(int *argc, char ***argv);
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    sw_error err = {0};
    (void)argc;
    (void)argv;
    if (fz_init(&err) != 0) {
        fprintf(stderr, "fuzz_dicom: %s\n", err.msg);
        exit(1);
    }
    return 0;
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    sw_error err = {0};
    int was_read;
    (void)fz_one(data, size, "fuzz-input", &was_read, &err);
    return 0;
}
