/*
 * A reconstructor outside Python: parallel-beam filtered backprojection in plain C99.
 *
 * It shows the exchange-folder contract of simbench (docs/plugins.md): read the arrays that
 * simbench wrote as .npy files, write image.npy, exit 0. Build and use:
 *
 *     cc -O2 -std=c99 -o parallel_fbp examples/parallel_fbp.c -lm
 *     simbench reconstruct SCAN_DIR --command "./parallel_fbp {exchange}" -o recon-c
 *
 * Method: the ramp filter as the spatial-domain kernel of Kak & Slaney, "Principles of
 * Computerized Tomographic Imaging" (1988), eq. 3.61 (h[0] = 1/(4 tau^2), h[n odd] =
 * -1/(n pi tau)^2, h[n even] = 0), applied by direct convolution with zero padding, then
 * backprojection with linear interpolation along the detector, times pi / n_views.
 * Only 2-D parallel-beam scans with views evenly spread over 180 or 360 degrees are handled; anything else
 * is refused with a message on standard error and exit code 1.
 */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define MAX_DIMS 4
#ifndef M_PI
#define M_PI 3.14159265358979323846
#endif

typedef struct {
    int ndim;
    long shape[MAX_DIMS];
    long count;
    double *data; /* every array is converted to double on reading */
} Array;

static void fail(const char *message, const char *detail) {
    fprintf(stderr, "parallel_fbp: %s%s%s\n", message, detail ? ": " : "", detail ? detail : "");
    exit(1);
}

/* Read a little-endian, C-ordered .npy of float32, float64 or int64 (format versions 1-3). */
static Array read_npy(const char *folder, const char *name) {
    char path[4096];
    snprintf(path, sizeof path, "%s/%s", folder, name);
    FILE *file = fopen(path, "rb");
    if (!file) fail("cannot open", path);
    unsigned char magic[8];
    if (fread(magic, 1, 8, file) != 8 || memcmp(magic, "\x93NUMPY", 6) != 0)
        fail("not a .npy file", path);
    uint32_t header_len = 0;
    if (magic[6] == 1) {
        unsigned char b[2];
        if (fread(b, 1, 2, file) != 2) fail("truncated header", path);
        header_len = b[0] | (b[1] << 8);
    } else {
        unsigned char b[4];
        if (fread(b, 1, 4, file) != 4) fail("truncated header", path);
        header_len = b[0] | (b[1] << 8) | (b[2] << 16) | ((uint32_t)b[3] << 24);
    }
    if (header_len > 65536) fail("header too long", path);
    char *header = calloc(header_len + 1, 1);
    if (!header || fread(header, 1, header_len, file) != header_len) fail("truncated header", path);
    if (strstr(header, "'fortran_order': True")) fail("Fortran order is not supported", path);
    int size = 0, is_float = 0;
    if (strstr(header, "'<f4'")) { size = 4; is_float = 1; }
    else if (strstr(header, "'<f8'")) { size = 8; is_float = 1; }
    else if (strstr(header, "'<i8'")) { size = 8; is_float = 0; }
    else fail("unsupported dtype (float32, float64 or int64 expected)", path);
    Array a = {0};
    a.count = 1;
    char *shape = strstr(header, "'shape':");
    if (!shape) fail("no shape in header", path);
    shape = strchr(shape, '(');
    if (!shape) fail("bad shape in header", path);
    shape++;
    while (*shape && *shape != ')') {
        while (*shape == ' ' || *shape == ',') shape++;
        if (*shape == ')') break;
        if (a.ndim == MAX_DIMS) fail("too many dimensions", path);
        char *end;
        long n = strtol(shape, &end, 10);
        if (end == shape || n < 0) fail("bad shape in header", path);
        a.shape[a.ndim++] = n;
        a.count *= n;
        shape = end;
    }
    free(header);
    a.data = malloc(sizeof(double) * (a.count ? a.count : 1));
    unsigned char *raw = malloc((size_t)size * (a.count ? a.count : 1));
    if (!a.data || !raw) fail("out of memory", path);
    if (fread(raw, (size_t)size, (size_t)a.count, file) != (size_t)a.count) fail("truncated data", path);
    fclose(file);
    for (long i = 0; i < a.count; i++) {
        if (is_float && size == 4) { float v; memcpy(&v, raw + 4 * i, 4); a.data[i] = v; }
        else if (is_float) { double v; memcpy(&v, raw + 8 * i, 8); a.data[i] = v; }
        else { int64_t v; memcpy(&v, raw + 8 * i, 8); a.data[i] = (double)v; }
    }
    free(raw);
    return a;
}

/* Write a float32 .npy (format version 1.0) of the given shape. */
static void write_npy_f32(const char *folder, const char *name, const float *data, int ndim,
                          const long *shape) {
    char path[4096], header[256], dims[128] = "";
    snprintf(path, sizeof path, "%s/%s", folder, name);
    for (int i = 0; i < ndim; i++) {
        char part[32];
        snprintf(part, sizeof part, "%ld,%s", shape[i], (ndim > 1 && i < ndim - 1) ? " " : "");
        strcat(dims, part);
    }
    int n = snprintf(header, sizeof header,
                     "{'descr': '<f4', 'fortran_order': False, 'shape': (%s), }", dims);
    int total = 10 + n + 1; /* magic + version + length + text + newline */
    int pad = (64 - total % 64) % 64;
    FILE *file = fopen(path, "wb");
    if (!file) fail("cannot write", path);
    unsigned short len = (unsigned short)(n + pad + 1);
    fwrite("\x93NUMPY\x01\x00", 1, 8, file);
    unsigned char b[2] = {(unsigned char)(len & 0xff), (unsigned char)(len >> 8)};
    fwrite(b, 1, 2, file);
    fwrite(header, 1, (size_t)n, file);
    for (int i = 0; i < pad; i++) fputc(' ', file);
    fputc('\n', file);
    long count = 1;
    for (int i = 0; i < ndim; i++) count *= shape[i];
    if (fwrite(data, sizeof(float), (size_t)count, file) != (size_t)count) fail("cannot write", path);
    if (fclose(file) != 0) fail("cannot write", path);
}

int main(int argc, char **argv) {
    if (argc != 2) fail("usage: parallel_fbp EXCHANGE_FOLDER", NULL);
    const char *folder = argv[1];
    Array parallel = read_npy(folder, "geometry/parallel.npy");
    if (parallel.data[0] != 1.0) fail("only parallel-beam scans are handled", NULL);
    Array sino = read_npy(folder, "projections.npy");
    if (sino.ndim != 2) fail("only 2-D scans (views x columns) are handled", NULL);
    Array angles = read_npy(folder, "geometry/angles_rad.npy");
    Array cols = read_npy(folder, "geometry/col_u_mm.npy");
    Array shape = read_npy(folder, "grid/shape.npy");
    Array spacing = read_npy(folder, "grid/spacing_mm.npy");
    Array centre = read_npy(folder, "grid/centre_mm.npy");
    long n_views = sino.shape[0], n_cols = sino.shape[1];
    long ny = (long)shape.data[1], nx = (long)shape.data[2];
    if (angles.count != n_views || cols.count != n_cols) fail("geometry does not match projections", NULL);
    double tau = cols.data[1] - cols.data[0];

    /* ramp filter: direct convolution with the spatial kernel, zero padded (no wrap-around) */
    double *filtered = calloc((size_t)(n_views * n_cols), sizeof(double));
    double *kernel = calloc((size_t)(2 * n_cols - 1), sizeof(double));
    if (!filtered || !kernel) fail("out of memory", NULL);
    for (long n = -(n_cols - 1); n <= n_cols - 1; n++) {
        double h = 0.0;
        if (n == 0) h = 1.0 / (4.0 * tau * tau);
        else if (n % 2 != 0) h = -1.0 / (M_PI * M_PI * (double)n * (double)n * tau * tau);
        kernel[n + n_cols - 1] = h;
    }
    for (long v = 0; v < n_views; v++)
        for (long j = 0; j < n_cols; j++) {
            double sum = 0.0;
            for (long k = 0; k < n_cols; k++)
                sum += sino.data[v * n_cols + k] * kernel[j - k + n_cols - 1];
            filtered[v * n_cols + j] = sum * tau;
        }

    /* views equally spaced over a half or a full turn: the integral over [0, pi) is
       (pi / n_views) times the sum either way (a full turn counts every ray twice) */
    float *image = calloc((size_t)(nx * ny), sizeof(float));
    if (!image) fail("out of memory", NULL);
    for (long iy = 0; iy < ny; iy++) {
        double y = ((double)iy - (ny - 1) / 2.0) * spacing.data[1] + centre.data[1];
        for (long ix = 0; ix < nx; ix++) {
            double x = ((double)ix - (nx - 1) / 2.0) * spacing.data[0] + centre.data[0];
            double sum = 0.0;
            for (long v = 0; v < n_views; v++) {
                /* detector coordinate of the point: t = x cos(phi) + y sin(phi) */
                double t = x * cos(angles.data[v]) + y * sin(angles.data[v]);
                double position = (t - cols.data[0]) / tau;
                long j = (long)floor(position);
                double w = position - (double)j;
                if (j >= 0 && j + 1 < n_cols)
                    sum += (1.0 - w) * filtered[v * n_cols + j] + w * filtered[v * n_cols + j + 1];
            }
            image[iy * nx + ix] = (float)(sum * (M_PI / n_views));
        }
    }
    long out_shape[2] = {ny, nx};
    write_npy_f32(folder, "image.npy", image, 2, out_shape);
    return 0;
}
