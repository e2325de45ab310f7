/* Decode a JPEG held in memory to packed RGB with the system's libjpeg (libjpeg-turbo): whole
 * (denom 1; the intake's whole frames) or at 1/denom of its size (denom 2, 4 or 8), the inverse DCT
 * scaling while decoding. Errors return non-zero with a message instead of the library's default
 * of ending the process; warnings (damaged entropy-coded data) are not errors. */
#include <setjmp.h>
#include <stdio.h>
#include <string.h>
#include <jpeglib.h>

struct nc_err {
    struct jpeg_error_mgr mgr;
    jmp_buf jump;
};

static void nc_error_exit(j_common_ptr cinfo) {
    struct nc_err *e = (struct nc_err *)cinfo->err;
    longjmp(e->jump, 1);
}

static void nc_output_message(j_common_ptr cinfo) {
    (void)cinfo; /* warnings are not printed */
}

/* out must hold width * height * 3 bytes; width and height are the expected reduced size.
 * dct_method: 0 the library's accurate integer inverse DCT (JDCT_ISLOW, its default), 1 the fast
 * integer one (JDCT_IFAST), 2 floating point (JDCT_FLOAT). */
int nc_jpeg_decode_reduced(const unsigned char *data, unsigned long len, int denom, int dct_method,
                           unsigned char *out, unsigned width, unsigned height, char *msg, unsigned long msg_len) {
    struct jpeg_decompress_struct cinfo;
    struct nc_err err;
    volatile int created = 0;
    cinfo.err = jpeg_std_error(&err.mgr);
    err.mgr.error_exit = nc_error_exit;
    err.mgr.output_message = nc_output_message;
    if (setjmp(err.jump)) {
        char buf[JMSG_LENGTH_MAX];
        (*cinfo.err->format_message)((j_common_ptr)&cinfo, buf);
        snprintf(msg, msg_len, "%s", buf);
        if (created) jpeg_destroy_decompress(&cinfo);
        return 1;
    }
    jpeg_create_decompress(&cinfo);
    created = 1;
    jpeg_mem_src(&cinfo, data, len);
    jpeg_read_header(&cinfo, TRUE);
    if (cinfo.jpeg_color_space == JCS_CMYK || cinfo.jpeg_color_space == JCS_YCCK) {
        snprintf(msg, msg_len, "CMYK");
        jpeg_destroy_decompress(&cinfo);
        return 2;
    }
    cinfo.scale_num = 1;
    cinfo.scale_denom = (unsigned)denom;
    cinfo.out_color_space = JCS_RGB;
    cinfo.dct_method = dct_method == 1 ? JDCT_IFAST : dct_method == 2 ? JDCT_FLOAT : JDCT_ISLOW;
    jpeg_start_decompress(&cinfo);
    if (cinfo.output_width != width || cinfo.output_height != height || cinfo.output_components != 3) {
        snprintf(msg, msg_len, "decoded to %ux%u px with %d components, expected %ux%u RGB", cinfo.output_width,
                 cinfo.output_height, cinfo.output_components, width, height);
        jpeg_destroy_decompress(&cinfo);
        return 1;
    }
    /* Several rows per call (the library's output group, up to 16): fewer calls, and whole
     * groups go straight to the output instead of through the library's row buffer. */
    while (cinfo.output_scanline < cinfo.output_height) {
        JSAMPROW rows[16];
        unsigned first = cinfo.output_scanline, n = cinfo.output_height - first, k;
        if (n > 16) n = 16;
        for (k = 0; k < n; k++) rows[k] = out + (size_t)(first + k) * width * 3;
        if (jpeg_read_scanlines(&cinfo, rows, n) == 0) {
            snprintf(msg, msg_len, "no rows decoded at row %u", first);
            jpeg_destroy_decompress(&cinfo);
            return 1;
        }
    }
    jpeg_finish_decompress(&cinfo);
    jpeg_destroy_decompress(&cinfo);
    return 0;
}
