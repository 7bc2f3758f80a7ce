/* test_common.c: the error record keeps the first failure; checked sizes catch overflow. */
#include <criterion/criterion.h>
#include <stdint.h>
#include <string.h>

#include "sw.h"

Test(common, first_failure_wins)
{
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(sw_error_set(&e, SW_EFORMAT, "dicom: %s: truncated", "a.dcm"), SW_EFORMAT);
    sw_error_set(&e, SW_EIO, "second");
    cr_assert_eq(e.status, SW_EFORMAT);
    cr_assert_str_eq(e.msg, "dicom: a.dcm: truncated");
    cr_assert_eq(sw_error_set(NULL, SW_EIO, "ignored"), SW_EIO);
}

Test(common, strlcpy_truncates)
{
    char b[4];
    cr_assert_eq(sw_strlcpy(b, "abcdef", sizeof b), 3);
    cr_assert_str_eq(b, "abc");
    cr_assert_eq(sw_strlcpy(b, NULL, sizeof b), 0);
    cr_assert_str_eq(b, "");
}

Test(common, mul_size_overflow)
{
    size_t r = 0;
    cr_assert_eq(sw_mul_size(1u << 20, 1u << 10, &r), 0);
    cr_assert_eq(r, (size_t)1 << 30);
    cr_assert_eq(sw_mul_size(SIZE_MAX / 2, 3, &r), -1);
}
