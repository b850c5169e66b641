// See cvshim.h. Built by cgo against the same OpenCV as gocv (pkg-config
// opencv4).
#include "cvshim.h"

#include <opencv2/core.hpp>
#include <opencv2/imgproc.hpp>
#include <opencv2/video/tracking.hpp>

#include <cmath>
#include <cstdlib>
#include <cstring>
#include <exception>
#include <vector>

struct tf_pyramid {
    std::vector<cv::Mat> levels; // image, derivative, image, derivative, …
};

static void set_err(char *err, int err_len, const char *msg) {
    if (err == nullptr || err_len <= 0) return;
    std::strncpy(err, msg, err_len - 1);
    err[err_len - 1] = 0;
}

extern "C" tf_pyramid *tf_pyramid_new(void) { return new tf_pyramid(); }

extern "C" void tf_pyramid_free(tf_pyramid *p) { delete p; }

extern "C" int tf_pyramid_build(tf_pyramid *p, const unsigned char *data, int rows, int cols, size_t step,
                                int win, int max_level, char *err, int err_len) {
    try {
        // A header over the caller's pixels. It is not a sub-matrix, so
        // OpenCV copies it into a bordered level 0 and the pyramid owns
        // all its data. Borders are buildOpticalFlowPyramid's defaults,
        // the ones calcOpticalFlowPyrLK uses when it builds pyramids
        // itself: BORDER_REFLECT_101 for the levels, BORDER_CONSTANT for
        // the derivatives. Mats of the right size are reused from the
        // previous build.
        cv::Mat img(rows, cols, CV_8UC1, const_cast<unsigned char *>(data), step);
        return cv::buildOpticalFlowPyramid(img, p->levels, cv::Size(win, win), max_level, true,
                                           cv::BORDER_REFLECT_101, cv::BORDER_CONSTANT, true);
    } catch (const std::exception &e) {
        set_err(err, err_len, e.what());
        return -1;
    }
}

extern "C" int tf_lk(const tf_pyramid *prev, const tf_pyramid *next, const float *prev_pts, float *next_pts,
                     unsigned char *status, float *min_eig, int n, int win, int max_level, int max_iter,
                     double eps, int flags, double min_eig_threshold, char *err, int err_len) {
    try {
        if (n <= 0) return 0;
        cv::Mat p0(n, 1, CV_32FC2, const_cast<float *>(prev_pts));
        cv::Mat p1(n, 1, CV_32FC2, next_pts);
        cv::Mat st(n, 1, CV_8UC1, status);
        cv::Mat er(n, 1, CV_32FC1, min_eig);
        cv::calcOpticalFlowPyrLK(prev->levels, next->levels, p0, p1, st, er, cv::Size(win, win), max_level,
                                 cv::TermCriteria(cv::TermCriteria::COUNT + cv::TermCriteria::EPS, max_iter, eps),
                                 flags, min_eig_threshold);
        // The outputs had the right size and type, so OpenCV wrote into
        // the caller's buffers; check rather than trust.
        if (p1.data != (uchar *)next_pts || st.data != status || er.data != (uchar *)min_eig) {
            set_err(err, err_len, "calcOpticalFlowPyrLK reallocated an output buffer");
            return -1;
        }
        return 0;
    } catch (const std::exception &e) {
        set_err(err, err_len, e.what());
        return -1;
    }
}

extern "C" int tf_min_eigen(const unsigned char *data, int rows, int cols, size_t step, int block_size, float *out,
                            char *err, int err_len) {
    try {
        cv::Mat img(rows, cols, CV_8UC1, const_cast<unsigned char *>(data), step);
        cv::Mat dst(rows, cols, CV_32FC1, out);
        cv::cornerMinEigenVal(img, dst, block_size, 3, cv::BORDER_REFLECT_101);
        if (dst.data != (uchar *)out) {
            set_err(err, err_len, "cornerMinEigenVal reallocated its output");
            return -1;
        }
        return 0;
    } catch (const std::exception &e) {
        set_err(err, err_len, e.what());
        return -1;
    }
}

#if defined(__x86_64__) && defined(__GNUC__)
#include <immintrin.h>

extern "C" int tf_have_vector_kernel(void) {
    __builtin_cpu_init();
    return __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma");
}

// warped_sample samples the image bilinearly at eight warped points of a
// patch row: lanes li (column offsets) of the row whose first point is
// base + (fx0, fy0), stepping (a0, a3) per column; the four neighbours are
// gathered.
static inline __attribute__((target("avx2,fma"), always_inline)) __m256
warped_sample(const float *base, int w, __m256i vw, __m256 a0, __m256 a3, __m256 fx0, __m256 fy0, __m256 li) {
    const __m256 X = _mm256_fmadd_ps(a0, li, fx0);
    const __m256 Y = _mm256_fmadd_ps(a3, li, fy0);
    const __m256 Xf = _mm256_floor_ps(X), Yf = _mm256_floor_ps(Y);
    const __m256 fx = _mm256_sub_ps(X, Xf), fy = _mm256_sub_ps(Y, Yf);
    const __m256i off = _mm256_add_epi32(_mm256_mullo_epi32(_mm256_cvtps_epi32(Yf), vw), _mm256_cvtps_epi32(Xf));
    const __m256 q00 = _mm256_i32gather_ps(base, off, 4);
    const __m256 q01 = _mm256_i32gather_ps(base + 1, off, 4);
    const __m256 q10 = _mm256_i32gather_ps(base + w, off, 4);
    const __m256 q11 = _mm256_i32gather_ps(base + w + 1, off, 4);
    const __m256 top = _mm256_fmadd_ps(fx, _mm256_sub_ps(q01, q00), q00);
    const __m256 bot = _mm256_fmadd_ps(fx, _mm256_sub_ps(q11, q10), q10);
    return _mm256_fmadd_ps(fy, _mm256_sub_ps(bot, top), top);
}

// Eight patch pixels of a row at a time: sample positions from the row's
// start (kept relative to its integer base so float precision is ample),
// four gathers for the bilinear neighbours, fused multiply–adds into
// eight-lane accumulators, summed in double at the end. Lanes past the
// row's end carry zero template and steepest-descent values and are masked
// out of the intensity sums.
extern "C" __attribute__((target("avx2,fma"))) void tf_patch_sums(const float *pix, int w, const float *t,
                                                                   const float *sd, int half, int stride,
                                                                   const double *m, double tm, double *out) {
    const int n = 2 * half + 1;
    const int plane = n * stride;
    __m256 b0 = _mm256_setzero_ps(), b1 = b0, b2 = b0, b3 = b0, b4 = b0, b5 = b0;
    __m256 si = b0, sii = b0, sit = b0;
    const __m256 vtm = _mm256_set1_ps((float)tm);
    const __m256 lane = _mm256_setr_ps(0, 1, 2, 3, 4, 5, 6, 7);
    const __m256 a0 = _mm256_set1_ps((float)m[0]), a3 = _mm256_set1_ps((float)m[3]);
    const __m256 vn = _mm256_set1_ps((float)n);
    const __m256i vw = _mm256_set1_epi32(w);
    for (int j = 0; j < n; j++) {
        const double v = j - half;
        const double X0 = -half * m[0] + m[1] * v + m[2];
        const double Y0 = -half * m[3] + m[4] * v + m[5];
        const int bx = (int)X0, by = (int)Y0;
        const __m256 fx0 = _mm256_set1_ps((float)(X0 - bx)), fy0 = _mm256_set1_ps((float)(Y0 - by));
        const float *base = pix + (long)by * w + bx;
        for (int i = 0; i < stride; i += 8) {
            const int k = j * stride + i;
            const __m256 li = _mm256_add_ps(lane, _mm256_set1_ps((float)i));
            __m256 val = warped_sample(base, w, vw, a0, a3, fx0, fy0, li);
            const __m256 tk = _mm256_loadu_ps(t + k);
            const __m256 e = _mm256_sub_ps(val, tk);
            b0 = _mm256_fmadd_ps(_mm256_loadu_ps(sd + k), e, b0);
            b1 = _mm256_fmadd_ps(_mm256_loadu_ps(sd + plane + k), e, b1);
            b2 = _mm256_fmadd_ps(_mm256_loadu_ps(sd + 2 * plane + k), e, b2);
            b3 = _mm256_fmadd_ps(_mm256_loadu_ps(sd + 3 * plane + k), e, b3);
            b4 = _mm256_fmadd_ps(_mm256_loadu_ps(sd + 4 * plane + k), e, b4);
            b5 = _mm256_fmadd_ps(_mm256_loadu_ps(sd + 5 * plane + k), e, b5);
            val = _mm256_and_ps(val, _mm256_cmp_ps(li, vn, _CMP_LT_OQ));
            si = _mm256_add_ps(si, val);
            sii = _mm256_fmadd_ps(val, val, sii);
            sit = _mm256_fmadd_ps(val, _mm256_sub_ps(tk, vtm), sit);
        }
    }
    const __m256 acc[9] = {b0, b1, b2, b3, b4, b5, si, sii, sit};
    float r[8];
    for (int q = 0; q < 9; q++) {
        _mm256_storeu_ps(r, acc[q]);
        double s = 0;
        for (int l = 0; l < 8; l++) s += r[l];
        out[q] = s;
    }
}
// Two passes of eight lanes: the warped samples (gathers, as in
// tf_patch_sums) with their sums for the gain and bias, then per pixel the
// static samples (one bilinear weight pair for the whole patch: plain
// loads), the comparison and saturating 16-bit vote increments. Lanes past
// the row's end are masked out of both.
extern "C" __attribute__((target("avx2,fma"))) void tf_occlusion_votes(const float *pix, int w, const float *t,
                                                                        int tstride, int half, int stride,
                                                                        const double *m, double tm, double tn2,
                                                                        double x0, double y0, double diff, float *iw,
                                                                        unsigned short *votes) {
    const int n = 2 * half + 1;
    const int plane = n * stride;
    const __m256 lane = _mm256_setr_ps(0, 1, 2, 3, 4, 5, 6, 7);
    const __m256 a0 = _mm256_set1_ps((float)m[0]), a3 = _mm256_set1_ps((float)m[3]);
    const __m256 vn = _mm256_set1_ps((float)n);
    const __m256 vtm = _mm256_set1_ps((float)tm);
    const __m256i vw = _mm256_set1_epi32(w);
    __m256 si = _mm256_setzero_ps(), sit = si;
    for (int j = 0; j < n; j++) {
        const double v = j - half;
        const double X0 = -half * m[0] + m[1] * v + m[2];
        const double Y0 = -half * m[3] + m[4] * v + m[5];
        const int bx = (int)X0, by = (int)Y0;
        const __m256 fx0 = _mm256_set1_ps((float)(X0 - bx)), fy0 = _mm256_set1_ps((float)(Y0 - by));
        const float *base = pix + (long)by * w + bx;
        for (int i = 0; i < stride; i += 8) {
            const int k = j * stride + i;
            const __m256 li = _mm256_add_ps(lane, _mm256_set1_ps((float)i));
            __m256 val = warped_sample(base, w, vw, a0, a3, fx0, fy0, li);
            val = _mm256_and_ps(val, _mm256_cmp_ps(li, vn, _CMP_LT_OQ));
            _mm256_storeu_ps(iw + k, val);
            si = _mm256_add_ps(si, val);
            sit = _mm256_fmadd_ps(val, _mm256_sub_ps(_mm256_loadu_ps(t + j * tstride + i), vtm), sit);
        }
    }
    float r[8];
    double ssi = 0, ssit = 0;
    _mm256_storeu_ps(r, si);
    for (int l = 0; l < 8; l++) ssi += r[l];
    _mm256_storeu_ps(r, sit);
    for (int l = 0; l < 8; l++) ssit += r[l];
    const float g = tn2 > 0 ? (float)(ssit / tn2) : 0.f;
    const __m256 vg = _mm256_set1_ps(g), vmi = _mm256_set1_ps((float)(ssi / (n * n)));
    const __m256 vd = _mm256_set1_ps((float)diff);
    const __m256 sign = _mm256_set1_ps(-0.0f);
    const double zx = x0 - half, zy = y0 - half;
    const int ix = (int)zx, iy = (int)zy;
    const __m256 zfx = _mm256_set1_ps((float)(zx - ix)), zfy = _mm256_set1_ps((float)(zy - iy));
    const __m128i one = _mm_set1_epi16(1);
    for (int j = 0; j < n; j++) {
        const float *r0 = pix + (long)(iy + j) * w + ix;
        const float *r1 = r0 + w;
        for (int i = 0; i < stride; i += 8) {
            const int k = j * stride + i;
            const __m256 li = _mm256_add_ps(lane, _mm256_set1_ps((float)i));
            const __m256 q00 = _mm256_loadu_ps(r0 + i), q01 = _mm256_loadu_ps(r0 + i + 1);
            const __m256 q10 = _mm256_loadu_ps(r1 + i), q11 = _mm256_loadu_ps(r1 + i + 1);
            const __m256 top = _mm256_fmadd_ps(zfx, _mm256_sub_ps(q01, q00), q00);
            const __m256 bot = _mm256_fmadd_ps(zfx, _mm256_sub_ps(q11, q10), q10);
            const __m256 z = _mm256_fmadd_ps(zfy, _mm256_sub_ps(bot, top), top);
            const __m256 wv = _mm256_loadu_ps(iw + k);
            const __m256 tk = _mm256_loadu_ps(t + j * tstride + i);
            const __m256 em = _mm256_andnot_ps(sign, _mm256_sub_ps(_mm256_sub_ps(wv, vmi), _mm256_mul_ps(vg, _mm256_sub_ps(tk, vtm))));
            const __m256 ez = _mm256_andnot_ps(sign, _mm256_sub_ps(z, tk));
            const __m256 inf = _mm256_and_ps(_mm256_cmp_ps(_mm256_andnot_ps(sign, _mm256_sub_ps(wv, z)), vd, _CMP_GE_OQ),
                                             _mm256_cmp_ps(li, vn, _CMP_LT_OQ));
            const __m256 st = _mm256_and_ps(inf, _mm256_cmp_ps(ez, em, _CMP_LT_OQ));
            // Lane masks (all ones) to 16-bit 0/1 increments.
            const __m256i mi = _mm256_castps_si256(inf), ms = _mm256_castps_si256(st);
            const __m128i pi = _mm_packs_epi32(_mm256_castsi256_si128(mi), _mm256_extracti128_si256(mi, 1));
            const __m128i ps = _mm_packs_epi32(_mm256_castsi256_si128(ms), _mm256_extracti128_si256(ms, 1));
            __m128i *vi = (__m128i *)(votes + k), *vs = (__m128i *)(votes + plane + k);
            _mm_storeu_si128(vi, _mm_adds_epu16(_mm_loadu_si128(vi), _mm_and_si128(pi, one)));
            _mm_storeu_si128(vs, _mm_adds_epu16(_mm_loadu_si128(vs), _mm_and_si128(ps, one)));
        }
    }
}
#else
extern "C" int tf_have_vector_kernel(void) { return 0; }

extern "C" void tf_patch_sums(const float *, int, const float *, const float *, int, int, const double *, double,
                              double *) {
    std::abort(); // never called: tf_have_vector_kernel is 0
}

extern "C" void tf_occlusion_votes(const float *, int, const float *, int, int, int, const double *, double,
                                   double, double, double, double, float *, unsigned short *) {
    std::abort(); // never called: tf_have_vector_kernel is 0
}
#endif
