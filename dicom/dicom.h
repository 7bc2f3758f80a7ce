/* dicom.h: the C interface over DCMTK: read MR images (classic and Enhanced) into float pixels with
 * their attributes, and write MR Image Storage files for the simulator. The only C++ is behind it.
 */
#ifndef DICOM_H
#define DICOM_H

#include <stddef.h>

/* sw.h has no C++ guards of its own: include it with C linkage. */
#ifdef __cplusplus
extern "C" {
#endif

#include "sw.h"

#define DCM_UID_MAX 65 /* 64 characters and the terminator */
#define DCM_STR_MAX 129

/* One image (one frame of a file) with the attributes analysis and store need. Strings are empty
 * when the attribute is absent; numbers are NAN (doubles) or 0 (ints) when absent unless noted. */
typedef struct dcm_image {
    /* identification */
    char sop_class_uid[DCM_UID_MAX];
    char sop_instance_uid[DCM_UID_MAX];
    char study_instance_uid[DCM_UID_MAX];
    char series_instance_uid[DCM_UID_MAX];
    char frame_of_reference_uid[DCM_UID_MAX];
    char transfer_syntax_uid[DCM_UID_MAX];
    char modality[17];
    char station_name[DCM_STR_MAX];
    char device_serial[DCM_STR_MAX];
    char manufacturer[DCM_STR_MAX];
    char model[DCM_STR_MAX];
    char institution[DCM_STR_MAX];
    char series_description[DCM_STR_MAX];
    char protocol_name[DCM_STR_MAX];
    char patient_name[DCM_STR_MAX];
    char patient_id[DCM_STR_MAX];
    char mr_acquisition_type[17];                                                 /* "2D" or "3D" */
    char study_date[9], series_date[9], acquisition_date[9], content_date[9];     /* YYYYMMDD */
    char study_time[17], series_time[17], acquisition_time[17], content_time[17]; /* HHMMSS.frac */
    /* acquisition */
    int series_number;
    int instance_number;
    int acquisition_number;
    int echo_number; /* 1 when absent */
    double echo_time_ms;
    double repetition_time_ms;
    double slice_thickness_mm;
    double spacing_between_slices_mm;
    double magnetic_field_t;
    double imaging_frequency_mhz;
    double flip_angle_deg;
    /* geometry (patient frame, LPS, mm) */
    double ipp[3];           /* ImagePositionPatient: centre of the first transmitted pixel */
    double iop[6];           /* ImageOrientationPatient: row direction, then column direction */
    double pixel_spacing[2]; /* PixelSpacing as stored: [0] between rows, [1] between columns */
    int has_geometry;        /* 1 when ipp, iop and pixel_spacing were all present */
    /* pixels */
    int rows, columns;
    int frame;       /* 1-based frame number in a multi-frame file, 0 for a single-frame file */
    int frame_count; /* NumberOfFrames of the file (1 for single-frame) */
    int bits_stored;
    int pixel_representation;                /* 0 unsigned, 1 signed */
    double rescale_slope, rescale_intercept; /* as applied (1 and 0 when absent) */
    float *pixels; /* rows x columns, row-major, stored value x slope + intercept; owned */
    /* added after the first contract (additive): */
    char photometric[17]; /* PhotometricInterpretation: MONOCHROME1 or MONOCHROME2 */
    int bits_allocated;   /* 8, 16 or 32 */
    int high_bit;
    char image_type[DCM_STR_MAX];        /* ImageType, values joined with '\\' */
    char scanning_sequence[17];          /* ScanningSequence (classic; writer default "SE") */
    char sequence_variant[17];           /* SequenceVariant (classic; writer default "NONE") */
    char software_versions[DCM_STR_MAX]; /* SoftwareVersions, values joined with '\\' */
    char receive_coil[DCM_STR_MAX];      /* ReceiveCoilName (top level or MRReceiveCoilSequence) */
    char stack_id[17];                   /* FrameContentSequence StackID (multi-frame) */
    int in_stack_position;               /* FrameContentSequence InStackPositionNumber, 0 absent */
    char patient_position[17];           /* PatientPosition: "HFS", "FFS", ...; written when set */
    double pixel_bandwidth_hz;           /* PixelBandwidth, Hz per pixel (NAN absent) */
} dcm_image;

/* All frames of one file. */
typedef struct dcm_file {
    int nframes;
    dcm_image *frames; /* nframes images; each owns its pixels */
} dcm_file;

/* Options for reading. */
typedef struct dcm_read_opts {
    int header_only; /* 1: attributes only, pixels left NULL (fast path for assembly) */
} dcm_read_opts;

/* Once per process, single-threaded, before any other call: silences DCMTK's log, checks the data
 * dictionary is loaded (implicit-VR files would read as garbage without it), lets DCMTK give UN
 * elements their dictionary VR, and registers the JPEG, JPEG-LS and RLE decoders. Safe to call
 * twice. Fails (SW_EIO) when the dictionary is missing. */
sw_status dcm_init(sw_error *err);
/* Unregisters the decoders; dcm_init may be called again afterwards. */
void dcm_shutdown(void);

/* Reads a file (classic MR Image Storage or Enhanced MR Image Storage; other image storage classes
 * are read as far as their attributes allow). The file is read fully into memory before return, so
 * it may be moved afterwards. On success *out is a new dcm_file the caller frees with
 * dcm_file_free; on failure *out is NULL and err names the file and the reason. opts may be NULL.
 *
 * Each frame's geometry, rescale, echo time, repetition time and flip angle come from its item of
 * the Per-frame Functional Groups Sequence, else the Shared Functional Groups item, else the top
 * level. Echo number: the frame's DimensionIndexValues for an EffectiveEchoTime dimension, else
 * (multi-frame) the rank of the frame's effective echo time among the file's, else EchoNumbers,
 * else 1. frame is i + 1 when the file has NumberOfFrames, 0 otherwise.
 *
 * Full read: refuses (SW_EUNSUPPORTED) JPEG 2000 ("JPEG 2000 is not supported"), syntaxes DCMTK
 * cannot decode, SamplesPerPixel other than 1, PhotometricInterpretation other than MONOCHROME1/2,
 * BitsAllocated other than 8, 16, 32, float pixel data, files without pixel data and pixel data
 * that decodes to more than 256 MiB (the pixel module is checked before any decoder runs), and
 * a deflated data set that inflates to more than 64 MiB (checked before DCMTK parses it, on the
 * header-only path too); refuses (SW_EFORMAT) sequences nested deeper than 128 levels (walked
 * before DCMTK parses, whose recursion would overflow the stack);
 * refuses (SW_EFORMAT) truncated or malformed data, pixel data shorter than the frames need, a
 * zero or non-finite rescale slope, a rescale that takes values beyond the float range, UIDs
 * over 64 characters and NumberOfFrames over 100000.
 * header_only: the attributes whatever the pixel encoding (a JPEG 2000 or RGB file reads, so that
 * the caller can sort it by modality and SOP class); fails only when the data set cannot be
 * parsed or is inconsistent in itself (UIDs, NumberOfFrames against the pixel data length and the
 * per-frame items). Strings are UTF-8 (converted from SpecificCharacterSet where DCMTK can; bytes
 * that are not UTF-8 become '?').
 *
 * After dcm_init, reads share no state of ours and may run in several threads (DCMTK's
 * dictionary and codec registries are read-locked; two threads reading plain, compressed,
 * Enhanced and character-set files at once are tested, without a race detector). */
sw_status dcm_read_file(const char *path, const dcm_read_opts *opts, dcm_file **out, sw_error *err);
/* Same, from a buffer (copied into an anonymous memory file: Linux memfd and /proc); name is used
 * in messages only. */
sw_status dcm_read_buffer(const void *data, size_t len, const char *name, const dcm_read_opts *opts,
                          dcm_file **out, sw_error *err);
/* Frees f, its frames and their pixels; NULL is ignored. */
void dcm_file_free(dcm_file *f);

/* Writing (the simulator's output). Pixels are rounded (to nearest, halves to even) and clamped to
 * unsigned 16-bit stored values with BitsStored 12 (clamped to 0..4095) and no rescale (the
 * rescale fields are ignored). Explicit VR little endian, with a file meta header naming
 * slicewarden (ImplementationVersionName SLICEWARDEN01). All UIDs and attributes are taken from
 * the dcm_image fields (empty ones are omitted, except type 1 and 2 attributes of the MR Image IOD,
 * which get valid defaults: new UIDs, ImageType ORIGINAL\PRIMARY\OTHER, ScanningSequence SE,
 * SequenceVariant NONE, MRAcquisitionType 2D, PatientPosition HFS unless patient_position is set,
 * BodyPartExamined HEAD).
 * Geometry is required: finite ImagePositionPatient, ImageOrientationPatient of two orthogonal unit
 * vectors (to 1e-4), positive PixelSpacing; a non-finite pixel, an invalid UID or a value too long
 * for its VR is refused (SW_EINVAL). Non-ASCII text is written as UTF-8 (ISO_IR 192). The file is
 * written to a hidden temporary ".<name>.XXXXXX" beside path, synced and renamed into place, so a
 * watcher never sees it half-written (it should ignore names starting with '.'). */
sw_status dcm_write_mr(const char *path, const dcm_image *img, sw_error *err);
/* Enhanced MR Image Storage: n frames of one size in one file, with per-frame plane position,
 * shared plane orientation and pixel measures, and per-frame MR echo. UIDs of frames[0] name the
 * file; each frame's sop_instance_uid is ignored. Orientation, pixel measures, timing and rescale
 * go to the shared groups when every frame has the same, else per frame. Each frame's
 * rescale_slope / rescale_intercept (when finite, slope non-zero; else 1 and 0) is written in its
 * Pixel Value Transformation and the stored value is round((value - intercept) / slope), clamped
 * to 0..4095. Dimensions: StackID (stack_id, default "1"), InStackPositionNumber (in_stack_position
 * when every frame has one, else the rank of the position along the slice normal) and
 * EffectiveEchoTime with echo_number as its index. Also required here (type 1 in this IOD):
 * echo_time_ms, repetition_time_ms, slice_thickness_mm, magnetic_field_t, imaging_frequency_mhz,
 * pixel_bandwidth_hz (> 0) and echo_number 1..65535. */
sw_status dcm_write_enhanced_mr(const char *path, const dcm_image *frames, int n, sw_error *err);
/* The same with flags. DCM_WRITE_NOSYNC leaves out the fsync of the file and its folder (the file
 * still appears whole under its name, by rename): for scratch data such as simulated series, where
 * a crash may lose the file but never leaves a partial one. */
enum { DCM_WRITE_NOSYNC = 1u };
sw_status dcm_write_mr_flags(const char *path, const dcm_image *img, unsigned flags, sw_error *err);
sw_status dcm_write_enhanced_mr_flags(const char *path, const dcm_image *frames, int n,
                                      unsigned flags, sw_error *err);

/* A new UID in the 2.25 scheme (DICOM PS3.5 B.2: "2.25." and the decimal value of a random
 * version 4 UUID from getrandom), valid without a registered root and at most 44 characters.
 * suffix_hint is ignored (kept for the interface). buf must hold DCM_UID_MAX. */
void dcm_new_uid(char *buf, const char *suffix_hint);

#ifdef __cplusplus
}
#endif

#endif
