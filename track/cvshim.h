// C interface to the few OpenCV calls gocv v0.31.0 does not expose:
// building a Lucas–Kanade pyramid once per frame and running pyramidal LK
// on pyramids. See cvshim.go.
#ifndef TRACKFACTOR_CVSHIM_H
#define TRACKFACTOR_CVSHIM_H

#include <stddef.h>

#ifdef __cplusplus
extern "C" {
#endif

typedef struct tf_pyramid tf_pyramid;

tf_pyramid *tf_pyramid_new(void);
void tf_pyramid_free(tf_pyramid *p);

// tf_pyramid_build builds the pyramid of an 8-bit grey image (rows × cols,
// step bytes per row) with Scharr derivatives, for LK windows up to win ×
// win and at most max_level levels above full resolution. It returns the
// number of levels built above full resolution, or -1 with a message in
// err (err_len bytes, NUL-terminated) when OpenCV throws.
int tf_pyramid_build(tf_pyramid *p, const unsigned char *data, int rows, int cols, size_t step,
                     int win, int max_level, char *err, int err_len);

// tf_lk runs OpenCV's calcOpticalFlowPyrLK from prev to next on n points.
// prev_pts and next_pts hold n (x, y) pairs; with OPTFLOW_USE_INITIAL_FLOW
// in flags next_pts holds the starting guesses on input. status and
// min_eig receive one value per point. Returns 0, or -1 with a message in
// err when OpenCV throws.
int tf_lk(const tf_pyramid *prev, const tf_pyramid *next, const float *prev_pts, float *next_pts,
          unsigned char *status, float *min_eig, int n, int win, int max_level, int max_iter,
          double eps, int flags, double min_eig_threshold, char *err, int err_len);

// tf_min_eigen computes OpenCV's cornerMinEigenVal (3×3 Sobel,
// BORDER_REFLECT_101) of an 8-bit grey image into out (rows·cols floats,
// row-major). Returns 0, or -1 with a message in err when OpenCV throws.
int tf_min_eigen(const unsigned char *data, int rows, int cols, size_t step, int block_size, float *out,
                 char *err, int err_len);

// tf_have_vector_kernel reports whether the CPU runs tf_patch_sums (x86-64
// with AVX2 and FMA).
int tf_have_vector_kernel(void);

// tf_patch_sums is one pass of the inverse-compositional refinement over a
// patch of half-size half (see refine.go, refPatch.sums): it samples the
// float image pix (w pixels per row) bilinearly at W(u, v; m) for every
// patch pixel and returns in out b_q = Σ SD_q·(I(W) − T) for q = 0..5,
// then Σ I, Σ I², Σ I·(T − tm). t and sd (6 planes) have rows of stride
// floats (2·half+1 rounded up to 8, padding zero). The caller guarantees
// that the patch, padded rows included, lies inside the image with a pixel
// to spare.
void tf_patch_sums(const float *pix, int w, const float *t, const float *sd, int half, int stride,
                   const double *m, double tm, double *out);

// tf_occlusion_votes adds one frame's occlusion-boundary votes for the
// central (2·half+1)² pixels of a patch (see boundary.go,
// refPatch.occlusionVotes): the track's hypothesis samples pix
// bilinearly at W(u, v; m) with a least-squares gain and bias (tm and
// tn2 = ‖T − tm‖² of those pixels of the template t, rows of tstride
// floats), the static one at (x0 + u, y0 + v); where the two differ by at
// least diff, votes[k] (informative) is incremented and, when the static
// hypothesis is the closer, votes[plane + k] too (saturating at 65535),
// k = row·stride + column, plane = (2·half+1)·stride, stride a multiple of
// 8. iw is scratch of plane floats. The caller guarantees that both
// patches, padded rows included, lie inside the image with a pixel to
// spare, and that t has stride floats from each row's start.
void tf_occlusion_votes(const float *pix, int w, const float *t, int tstride, int half, int stride,
                        const double *m, double tm, double tn2, double x0, double y0, double diff, float *iw,
                        unsigned short *votes);

#ifdef __cplusplus
}
#endif

#endif
