/*
 * kernel_plain.c -- a plain C version of rtstage's requantization recurrence,
 * kept only as the baseline of tools/bench_core.py.
 *
 * It computes, word for word, what rtstage/kernel.py:process_block computes for
 * TPDF dither (kernel dither code 2) at a constant gain (no ramp in progress):
 *
 *   for sample index n on channel c
 *     (w0, w1, w2, w3) = Philox4x64-10(counter = (n >> 2, 0, 0, 0), key = (seed, c))
 *     a = low 32 bits of w[n & 3], b = its high 32 bits
 *     U(w) = (w + 1/2) 2^-32 - 1/2
 *     d    = (U(a) + U(b)) dither_scale                       (TPDF, in LSB)
 *     u    = x gain 2^(B-1) - sum_{k=1..N} h_k e[n-k]
 *     q    = floor(u + d + 1/2), limited to [-2^(B-1), 2^(B-1) - 1]
 *     e    = q - u, limited to +-feedback_peak when q was limited
 *     e    = 0 when |e| < 1e-30 (no denormals in the history)
 *     y    = q << out_shift
 *
 * Non-finite input is replaced (NaN -> 0, +-Inf -> +-1) and clears the
 * channel's history, as in the kernel.  The floating-point operations are the
 * same operations in the same order as the kernel's, so the words agree bit for
 * bit (build without FMA contraction: -ffp-contract=off).
 *
 * "Plain" is deliberate: the outer loop runs over channels and the inner loop
 * over frames (striding through the interleaved buffers), the error history is
 * a shifted array (memmove per sample), and Philox is computed for every sample
 * from scratch (no reuse of the block among the four samples it serves).  This
 * is the straightforward C a reader would write from the recurrence above.
 *
 * Build (tools/bench_core.py does this):
 *   gcc -O3 -ffp-contract=off -shared -fPIC -o tools/build/kernel_plain.so tools/kernel_plain.c -lm
 *
 * References
 * ----------
 * J. K. Salmon, M. A. Moraes, R. O. Dror, D. E. Shaw, "Parallel random numbers:
 * as easy as 1, 2, 3", Proc. SC11, 2011 (Philox4x64-10; constants as in
 * numpy.random.Philox).
 */

#include <math.h>
#include <stdint.h>
#include <string.h>

#define PHILOX_M0 0xD2E7470EE14C6C93ULL
#define PHILOX_M1 0xCA5A826395121157ULL
#define PHILOX_W0 0x9E3779B97F4A7C15ULL
#define PHILOX_W1 0xBB67AE8584CAA73BULL
#define PHILOX_ROUNDS 10
#define MAX_TAPS 32
#define DENORMAL_GUARD 1e-30

static void philox4x64_10(uint64_t ctr[4], uint64_t k0, uint64_t k1)
{
    uint64_t c0 = ctr[0], c1 = ctr[1], c2 = ctr[2], c3 = ctr[3];
    for (int r = 0; r < PHILOX_ROUNDS; r++) {
        if (r > 0) {
            k0 += PHILOX_W0;
            k1 += PHILOX_W1;
        }
        unsigned __int128 p0 = (unsigned __int128)PHILOX_M0 * c0;
        unsigned __int128 p1 = (unsigned __int128)PHILOX_M1 * c2;
        uint64_t hi0 = (uint64_t)(p0 >> 64), lo0 = (uint64_t)p0;
        uint64_t hi1 = (uint64_t)(p1 >> 64), lo1 = (uint64_t)p1;
        uint64_t n0 = hi1 ^ c1 ^ k0;
        uint64_t n2 = hi0 ^ c3 ^ k1;
        c0 = n0;
        c1 = lo1;
        c2 = n2;
        c3 = lo0;
    }
    ctr[0] = c0;
    ctr[1] = c1;
    ctr[2] = c2;
    ctr[3] = c3;
}

static double uniform_of_half(uint64_t w)
{
    return ((double)w + 0.5) * 0x1p-32 - 0.5;
}

/*
 * Requantize nframes interleaved frames of nch channels (float64 in, int16 out).
 *
 * hist     : nch * MAX_TAPS doubles, hist[c * MAX_TAPS + k] = e[n-1-k] (updated)
 * clipped  : nch counters of limited samples (updated)
 * nonfinite: nch counters of replaced samples (updated)
 * frame0   : sample index of the first frame
 */
void rq_plain_tpdf_f64_i16(const double *x, int16_t *y, int64_t nframes, int64_t nch, int64_t bits,
                           uint64_t seed, const double *h, int64_t ntaps, double gain, double dither_scale,
                           double feedback_peak, int64_t out_shift, int64_t frame0, double *hist,
                           int64_t *clipped, int64_t *nonfinite)
{
    double scale = ldexp(1.0, (int)(bits - 1));
    double q_hi = scale - 1.0;
    double q_lo = -scale;
    for (int64_t c = 0; c < nch; c++) {
        double *hc = hist + c * MAX_TAPS;
        for (int64_t n = 0; n < nframes; n++) {
            int64_t index = frame0 + n;
            double xv = x[n * nch + c];
            if (!isfinite(xv)) {
                nonfinite[c]++;
                if (isnan(xv))
                    xv = 0.0;
                else if (xv > 0.0)
                    xv = 1.0;
                else
                    xv = -1.0;
                memset(hc, 0, MAX_TAPS * sizeof(double));
            }
            double u = xv * gain * scale;
            if (ntaps > 0) {
                double fb = 0.0;
                for (int64_t k = 0; k < ntaps; k++)
                    fb += h[k] * hc[k];
                u -= fb;
            }
            uint64_t w[4] = {(uint64_t)index >> 2, 0, 0, 0};
            philox4x64_10(w, seed, (uint64_t)c);
            uint64_t word = w[index & 3];
            double d = (uniform_of_half(word & 0xFFFFFFFFULL) + uniform_of_half(word >> 32)) * dither_scale;
            double q = floor(u + d + 0.5);
            double e = q - u;
            if (q > q_hi || q < q_lo) {
                q = q > q_hi ? q_hi : q_lo;
                clipped[c]++;
                e = q - u;
                if (e > feedback_peak)
                    e = feedback_peak;
                else if (e < -feedback_peak)
                    e = -feedback_peak;
            }
            if (fabs(e) < DENORMAL_GUARD)
                e = 0.0;
            if (ntaps > 1)
                memmove(hc + 1, hc, (size_t)(ntaps - 1) * sizeof(double));
            hc[0] = e;
            y[n * nch + c] = (int16_t)((int64_t)q << out_shift);
        }
    }
}
