/*
 * tickscope.core._kernels: two loops of the per-step work written once in C (numpy's per-call
 * overhead costs more than their arithmetic on arrays of a few thousand samples).
 *
 * Each has a numpy twin in tickscope/core/kernels.py that is the reference (used when this
 * module was not built); tests/test_kernels.py checks that both give the same numbers.
 * Arrays come in through the buffer protocol (no numpy headers are needed to build).
 *
 *   newton_peaks(C, tau, val, w, w1, w2, nfft, iters)
 *       Newton's method on the correlations whose rfft spectra are the rows of C (complex128),
 *       each from its own start tau[r] (updated in place); val[r] the correlation there.
 *   ringdown(x, samplerate, noise_power, start_db, stop_db, min_range_db, margin_db)
 *       -> (slope_db_per_s, fit_range_db, fit_rms_db) or None
 *       Schroeder's backward-integrated decay curve and a line through it in dB
 *       (see measure_ringdown in ringdown.py for the method and its sources).
 *   onset_scan(now, bg, thr, floor, sub, rise, first_frame, ns, refractory, last, quiet, onsets, floors)
 *       The detector's onset rule over a chunk's frames (see ImpactDetector._onsets_numpy).
 *   frame_power(x, head, lag, hop, out, kind, scale) -> (max, min, sum)
 *       The detector's one pass over every sample (ImpactDetector._frame_energy): the mean power
 *       of x[n] - x[n-lag] per frame of hop samples into out (head holds the lag samples before
 *       x), and the chunk's largest and smallest sample and its sum.  x and head are float32
 *       (kind 0), or 16-bit (kind 2) or 32-bit (kind 4) integers standing for their value times
 *       scale, with the same results as the float32 samples the file reader would have made.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#ifndef M_PI
#define M_PI 3.14159265358979323846
#endif
#include <stdlib.h>
#include <string.h>

static int
get_buffer(PyObject *obj, Py_buffer *view, int writable, Py_ssize_t itemsize, const char *what)
{
    if (PyObject_GetBuffer(obj, view, (writable ? PyBUF_WRITABLE : 0) | PyBUF_C_CONTIGUOUS) < 0)
        return -1;
    if (view->len % itemsize) {
        PyBuffer_Release(view);
        PyErr_Format(PyExc_ValueError, "%s: buffer length is not a multiple of %zd bytes", what, itemsize);
        return -1;
    }
    return 0;
}

/* Take a buffer into `held` (released in reverse at the function's `done:` label), or go there
   with the error set; for the functions that take many buffers. */
#define TAKE(obj, view, wr, size, name)                          \
    do {                                                         \
        if (get_buffer(obj, view, wr, size, name) < 0)           \
            goto done;                                           \
        held[nheld++] = view;                                    \
    } while (0)

/* sum_k wa[k] Im(C[k] z^k) and sum_k wb[k] Re(C[k] z^k), z = exp(2 pi i tau / nfft); the powers of z
   by running products, as numpy's cumprod forms them in timing._rotate */
static void
rotated_sums(const double *c, Py_ssize_t nb, double tau, double nfft, const double *wa, const double *wb,
             double *sum_im, double *sum_re)
{
    const double th = 2.0 * M_PI * tau / nfft;
    const double rr = cos(th), ri = sin(th);
    double pr = 1.0, pi = 0.0, si = 0.0, sr = 0.0;
    for (Py_ssize_t k = 0; k < nb; k++) {
        if (k) {
            const double npr = pr * rr - pi * ri;
            pi = pr * ri + pi * rr;
            pr = npr;
        }
        const double a = c[2 * k], b = c[2 * k + 1];
        const double re = a * pr - b * pi, im = a * pi + b * pr;
        if (wa)
            si += im * wa[k];
        sr += re * wb[k];
    }
    *sum_im = si;
    *sum_re = sr;
}

/* Newton's method on one correlation (its rfft spectrum cr) from lag t; returns the lag and puts
   the correlation there in *val */
static double
newton_one(const double *cr, Py_ssize_t nb, double t, Py_ssize_t nfft, const double *w, const double *w1,
           const double *w2, Py_ssize_t iters, double *val)
{
    double d1, d2, unused;
    for (Py_ssize_t it = 0; it < iters; it++) {
        rotated_sums(cr, nb, t, (double)nfft, w1, w2, &d1, &d2);
        d1 = -d1;
        d2 = -d2;
        if (!(d2 < 0))
            break; /* past a maximum's concave part: stop there */
        double step = -d1 / d2;
        step = step < -0.5 ? -0.5 : (step > 0.5 ? 0.5 : step);
        t += step;
        if (fabs(step) < 1e-6)
            break;
    }
    rotated_sums(cr, nb, t, (double)nfft, NULL, w, &unused, val);
    *val /= (double)nfft;
    return t;
}

static PyObject *
newton_peaks(PyObject *self, PyObject *args)
{
    PyObject *co, *to, *vo, *wo, *w1o, *w2o;
    Py_ssize_t nfft, iters;
    Py_buffer cb, tb, vb, wb, w1b, w2b;
    if (!PyArg_ParseTuple(args, "OOOOOOnn", &co, &to, &vo, &wo, &w1o, &w2o, &nfft, &iters))
        return NULL;
    if (get_buffer(co, &cb, 0, 2 * sizeof(double), "C") < 0)
        return NULL;
    if (get_buffer(to, &tb, 1, sizeof(double), "tau") < 0)
        goto fail_c;
    if (get_buffer(vo, &vb, 1, sizeof(double), "val") < 0)
        goto fail_t;
    if (get_buffer(wo, &wb, 0, sizeof(double), "w") < 0)
        goto fail_v;
    if (get_buffer(w1o, &w1b, 0, sizeof(double), "w1") < 0)
        goto fail_w;
    if (get_buffer(w2o, &w2b, 0, sizeof(double), "w2") < 0)
        goto fail_w1;
    const Py_ssize_t rows = tb.len / (Py_ssize_t)sizeof(double);
    const Py_ssize_t nb = wb.len / (Py_ssize_t)sizeof(double);
    if (vb.len != tb.len || w1b.len != wb.len || w2b.len != wb.len || cb.len != rows * nb * 2 * (Py_ssize_t)sizeof(double)
        || nfft < 1) {
        PyErr_SetString(PyExc_ValueError, "C must hold len(tau) rows of len(w) bins; val as long as tau");
        goto fail_w2;
    }
    const double *c = (const double *)cb.buf, *w = (const double *)wb.buf;
    const double *w1 = (const double *)w1b.buf, *w2 = (const double *)w2b.buf;
    double *tau = (double *)tb.buf, *val = (double *)vb.buf;
    Py_BEGIN_ALLOW_THREADS
    for (Py_ssize_t r = 0; r < rows; r++)
        tau[r] = newton_one(c + 2 * nb * r, nb, tau[r], nfft, w, w1, w2, iters, &val[r]);
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&w2b);
    PyBuffer_Release(&w1b);
    PyBuffer_Release(&wb);
    PyBuffer_Release(&vb);
    PyBuffer_Release(&tb);
    PyBuffer_Release(&cb);
    Py_RETURN_NONE;
fail_w2:
    PyBuffer_Release(&w2b);
fail_w1:
    PyBuffer_Release(&w1b);
fail_w:
    PyBuffer_Release(&wb);
fail_v:
    PyBuffer_Release(&vb);
fail_t:
    PyBuffer_Release(&tb);
fail_c:
    PyBuffer_Release(&cb);
    return NULL;
}

/* number of elements of the non-decreasing a[0..m) / total that are <= level */
static Py_ssize_t
count_at_or_below(const double *a, Py_ssize_t m, double total, double level)
{
    Py_ssize_t lo = 0, hi = m;
    while (lo < hi) {
        Py_ssize_t mid = lo + (hi - lo) / 2;
        if (a[mid] / total <= level)
            lo = mid + 1;
        else
            hi = mid;
    }
    return lo;
}

static PyObject *
ringdown(PyObject *self, PyObject *args)
{
    PyObject *xo;
    double fs, noise, start_db, stop_db, min_range_db, margin_db;
    Py_buffer xb;
    if (!PyArg_ParseTuple(args, "Odddddd", &xo, &fs, &noise, &start_db, &stop_db, &min_range_db, &margin_db))
        return NULL;
    if (get_buffer(xo, &xb, 0, sizeof(double), "x") < 0)
        return NULL;
    const double *x = (const double *)xb.buf;
    const Py_ssize_t n = xb.len / (Py_ssize_t)sizeof(double);
    int ok = 0;
    double slope = 0.0, range_db = 0.0, rms = 0.0;
    double *work = NULL;
    if (n >= 16) {
        work = (double *)malloc(sizeof(double) * (size_t)(3 * n + 1));
        if (!work) {
            PyBuffer_Release(&xb);
            return PyErr_NoMemory();
        }
    }
    Py_BEGIN_ALLOW_THREADS
    if (work) {
        double *e = work, *cs = work + n, *rev = work + 2 * n + 1;
        Py_ssize_t k = (Py_ssize_t)(0.0005 * fs);
        if (k < 1)
            k = 1;
        const Py_ssize_t h = (k - 1) / 2, lo_start = k - 1 - h;
        cs[0] = 0.0;
        for (Py_ssize_t i = 0; i < n; i++) {
            e[i] = x[i] * x[i];
            cs[i + 1] = cs[i] + e[i];
        }
        /* the envelope's peak: a centred moving average over k samples (zeros outside); the
           window sums are compared, divided by k only where a value is needed */
        Py_ssize_t p = 0;
        double top = -INFINITY;
        for (Py_ssize_t i = 0; i < n; i++) {
            const double hi = cs[(i + h < n - 1 ? i + h : n - 1) + 1];
            const double lo = i < lo_start ? 0.0 : cs[i - lo_start];
            if (hi - lo > top) {
                top = hi - lo;
                p = i;
            }
        }
        const double peak = top / (double)k;
        if (peak > 0) {
            Py_ssize_t m = n - p;
            if (noise > 0) {
                /* where the smoothed energy first meets the noise */
                const double floor2 = 2.0 * noise;
                for (Py_ssize_t j = 0; j < n - p; j++) {
                    const Py_ssize_t i = p + j;
                    const double hi = cs[(i + h < n - 1 ? i + h : n - 1) + 1];
                    const double lo = i < lo_start ? 0.0 : cs[i - lo_start];
                    if ((hi - lo) / (double)k < floor2) {
                        Py_ssize_t b = j < 8 ? 8 : j;
                        m = b < m ? b : m;
                        break;
                    }
                }
            }
            /* the decay curve stored backwards (ascending), not yet divided by its total */
            double acc = 0.0;
            for (Py_ssize_t j = 0; j < m; j++) {
                double v = e[p + m - 1 - j] - noise;
                acc += v > 0.0 ? v : 0.0;
                rev[j] = acc;
            }
            if (rev[m - 1] > 0) {
                const double total = rev[m - 1];
                const double snr_db = noise > 0 ? 10.0 * log10(peak / noise) : 120.0;
                double lo_db = -(snr_db - margin_db);
                if (stop_db > lo_db)
                    lo_db = stop_db;
                if (start_db - lo_db >= min_range_db) {
                    Py_ssize_t c0 = count_at_or_below(rev, m, total, pow(10.0, start_db / 10.0));
                    Py_ssize_t i0 = c0 ? m - c0 : 0;
                    Py_ssize_t c1 = count_at_or_below(rev, m, total, pow(10.0, lo_db / 10.0));
                    Py_ssize_t i1 = c1 ? m - c1 : m - 1;
                    const Py_ssize_t nfit = i1 - i0;
                    if (nfit >= 4) {
                        /* least-squares line through the curve in dB over [i0, i1) */
                        const double to_db = 10.0 / log(10.0), mid = 0.5 * (double)(nfit - 1);
                        double sy = 0.0, scy = 0.0, y0 = 0.0, ylast = 0.0;
                        for (Py_ssize_t t = 0; t < nfit; t++) {
                            double r = rev[m - i0 - 1 - t] / total;
                            double y = log(r > 1e-30 ? r : 1e-30) * to_db;
                            rev[m - i0 - 1 - t] = y; /* keep the dB value for the residuals */
                            sy += y;
                            scy += ((double)t - mid) * y;
                            if (t == 0)
                                y0 = y;
                            ylast = y;
                        }
                        const double nf = (double)nfit;
                        const double sl = scy * 12.0 / (nf * (nf * nf - 1.0)); /* dB per sample */
                        if (sl < 0) {
                            const double mean = sy / nf;
                            double ss = 0.0;
                            for (Py_ssize_t t = 0; t < nfit; t++) {
                                double r = rev[m - i0 - 1 - t] - mean - sl * ((double)t - mid);
                                ss += r * r;
                            }
                            ok = 1;
                            slope = sl * fs;
                            range_db = y0 - ylast;
                            rms = sqrt(ss / nf);
                        }
                    }
                }
            }
        }
    }
    Py_END_ALLOW_THREADS
    free(work);
    PyBuffer_Release(&xb);
    if (!ok)
        Py_RETURN_NONE;
    return Py_BuildValue("ddd", slope, range_db, rms);
}

/* One frame's sums, the additions reassociated so that they run as vectors (the order of a float
   sum's terms changes its last bits only); samples are finite here (the reader zeroes others). */
__attribute__((optimize("O3", "fast-math")))
static void
frame_sums(const float *p, const float *q, Py_ssize_t hop, float *e_out, float *s_out, float *hi_io, float *lo_io)
{
    float e = 0.0f, s = 0.0f, hi = *hi_io, lo = *lo_io;
    for (Py_ssize_t j = 0; j < hop; j++) {
        const float v = p[j], d = v - q[j];
        e += d * d;
        s += v;
        hi = v > hi ? v : hi;
        lo = v < lo ? v : lo;
    }
    *e_out = e;
    *s_out = s;
    *hi_io = hi;
    *lo_io = lo;
}

/* Frames f0..f1 of a chunk, whose sample i is buf[i - base] (base < 0: buf begins with the lag
   samples before the chunk).  A frame whose lagged samples reach before the chunk sums in order;
   the others through frame_sums.  Every caller goes through here, so a chunk's numbers are the same
   whatever the buffer it came in (float samples, or 16/24-bit integers converted tile by tile). */
static void
frames_core(const float *buf, Py_ssize_t base, Py_ssize_t f0, Py_ssize_t f1, Py_ssize_t lag, Py_ssize_t hop,
            double *out, float *hi_io, float *lo_io, double *total)
{
    for (Py_ssize_t f = f0; f < f1; f++) {
        const Py_ssize_t a = f * hop;
        float e = 0.0f, s = 0.0f;
        if (a >= lag)
            frame_sums(buf + (a - base), buf + (a - lag - base), hop, &e, &s, hi_io, lo_io);
        else {
            float hi = *hi_io, lo = *lo_io;
            for (Py_ssize_t j = 0; j < hop; j++) {
                const Py_ssize_t i = a + j;
                const float v = buf[i - base], d = v - buf[i - lag - base];
                e += d * d;
                s += v;
                hi = v > hi ? v : hi;
                lo = v < lo ? v : lo;
            }
            *hi_io = hi;
            *lo_io = lo;
        }
        out[f] = (double)e / (double)hop;
        *total += s;
    }
}

#define TILE_FRAMES 256

/* sample k of x (or, for k < 0, of head, which holds the lag samples before x) as float32: integers
   times the scale (a power of two: exact, the value the file reader would give) */
static inline float
sample_at(const void *x, const void *head, Py_ssize_t lag, Py_ssize_t k, int kind, float scale)
{
    const void *src = k >= 0 ? x : head;
    const Py_ssize_t i = k >= 0 ? k : lag + k;
    switch (kind) {
    case 2:
        return (float)((const short *)src)[i] * scale;
    case 4:
        return (float)((const int *)src)[i] * scale;
    default:
        return ((const float *)src)[i];
    }
}

/* integers to float32 times a power of two (exact for 16- and 24-bit samples); plain loops the
   compiler turns into vector conversions */
static void
to_float_i16(const short *src, Py_ssize_t m, float scale, float *dst)
{
    for (Py_ssize_t k = 0; k < m; k++)
        dst[k] = (float)src[k] * scale;
}

static void
to_float_i32(const int *src, Py_ssize_t m, float scale, float *dst)
{
    for (Py_ssize_t k = 0; k < m; k++)
        dst[k] = (float)src[k] * scale;
}

static PyObject *
frame_power(PyObject *self, PyObject *args)
{
    PyObject *xo, *ho, *oo;
    Py_ssize_t lag, hop;
    int kind;
    double scale_d;
    Py_buffer xb, hb, ob;
    if (!PyArg_ParseTuple(args, "OOnnOid", &xo, &ho, &lag, &hop, &oo, &kind, &scale_d))
        return NULL;
    if (kind != 2 && kind != 4)
        kind = 0; /* float32 */
    const Py_ssize_t item = kind ? kind : (Py_ssize_t)sizeof(float);
    if (get_buffer(xo, &xb, 0, item, "x") < 0)
        return NULL;
    if (get_buffer(ho, &hb, 0, item, "head") < 0) {
        PyBuffer_Release(&xb);
        return NULL;
    }
    if (get_buffer(oo, &ob, 1, sizeof(double), "out") < 0) {
        PyBuffer_Release(&hb);
        PyBuffer_Release(&xb);
        return NULL;
    }
    const Py_ssize_t n = xb.len / item;
    const Py_ssize_t nf = hop > 0 ? n / hop : 0;
    if (lag < 1 || hop < 1 || hb.len != lag * item || ob.len != nf * (Py_ssize_t)sizeof(double)) {
        PyErr_SetString(PyExc_ValueError, "frame_power: head must hold lag samples and out len(x) // hop frames");
        PyBuffer_Release(&ob);
        PyBuffer_Release(&hb);
        PyBuffer_Release(&xb);
        return NULL;
    }
    const float scale = (float)scale_d;
    /* frames whose lagged samples reach into head; then, for integers, tiles of frames converted
       to float32 in a small buffer (the whole chunk is never converted at once) */
    Py_ssize_t f_head = (lag + hop - 1) / hop;
    if (f_head > nf)
        f_head = nf;
    const Py_ssize_t tile = kind ? TILE_FRAMES : f_head;
    Py_ssize_t cap = lag + (tile > f_head ? tile : f_head) * hop;
    float *scratch = (float *)malloc(sizeof(float) * (size_t)(cap > 0 ? cap : 1));
    if (!scratch) {
        PyBuffer_Release(&ob);
        PyBuffer_Release(&hb);
        PyBuffer_Release(&xb);
        return PyErr_NoMemory();
    }
    const void *x = xb.buf, *head = hb.buf;
    double *out = (double *)ob.buf;
    float hi = n ? sample_at(x, head, lag, 0, kind, scale) : 0.0f, lo = hi;
    double total = 0.0;
    Py_BEGIN_ALLOW_THREADS
    Py_ssize_t f = 0;
    while (f < nf) {
        const Py_ssize_t f1 = f == 0 && f_head ? f_head : (kind ? (f + tile < nf ? f + tile : nf) : nf);
        if (kind || f == 0) {
            /* samples f * hop - lag .. f1 * hop into scratch */
            const Py_ssize_t k0 = f * hop - lag, m = (f1 - f) * hop + lag;
            Py_ssize_t k = 0;
            for (; k < m && k0 + k < 0; k++) /* from head */
                scratch[k] = sample_at(x, head, lag, k0 + k, kind, scale);
            if (kind == 2)
                to_float_i16((const short *)x + (k0 + k), m - k, scale, scratch + k);
            else if (kind == 4)
                to_float_i32((const int *)x + (k0 + k), m - k, scale, scratch + k);
            else
                memcpy(scratch + k, (const float *)x + (k0 + k), sizeof(float) * (size_t)(m - k));
            frames_core(scratch, k0, f, f1, lag, hop, out, &hi, &lo, &total);
        } else
            frames_core((const float *)x, 0, f, f1, lag, hop, out, &hi, &lo, &total);
        f = f1;
    }
    for (Py_ssize_t i = nf * hop; i < n; i++) { /* samples after the last whole frame */
        const float v = sample_at(x, head, lag, i, kind, scale);
        total += v;
        hi = v > hi ? v : hi;
        lo = v < lo ? v : lo;
    }
    Py_END_ALLOW_THREADS
    free(scratch);
    PyBuffer_Release(&ob);
    PyBuffer_Release(&hb);
    PyBuffer_Release(&xb);
    return Py_BuildValue("ddd", (double)hi, (double)lo, total);
}

/* The lobe search, refinement and choice of timing.match_many for each row, after its FFTs (see
   _pick_numpy there, the reference: the same float32 and float64 steps in the same order). */
static PyObject *
match_pick(PyObject *self, PyObject *args)
{
    PyObject *co, *Co, *xo, *po, *wo, *w1o, *w2o, *to, *vo, *ro;
    Py_ssize_t l0, L, nt, width, nfft, iters;
    double energy;
    double tie = 0.03, refine = 0.0;
    if (!PyArg_ParseTuple(args, "OOOnnnnOdOOOnnOOO|dd", &co, &Co, &xo, &l0, &L, &nt, &width, &po, &energy, &wo, &w1o,
                          &w2o, &nfft, &iters, &to, &vo, &ro, &tie, &refine))
        return NULL;
    Py_buffer cb, Cb, xb, pb, wb, w1b, w2b, tb, vb, rb;
    Py_buffer *held[10];
    int nheld = 0, has_pref = po != Py_None;
    PyObject *result = NULL;
    double *cand = NULL, *rowbuf = NULL;
    TAKE(co, &cb, 0, sizeof(float), "c");
    TAKE(Co, &Cb, 0, 2 * sizeof(float), "C");
    TAKE(xo, &xb, 0, sizeof(float), "x");
    if (has_pref)
        TAKE(po, &pb, 0, sizeof(double), "prefer");
    TAKE(wo, &wb, 0, sizeof(double), "w");
    TAKE(w1o, &w1b, 0, sizeof(double), "w1");
    TAKE(w2o, &w2b, 0, sizeof(double), "w2");
    TAKE(to, &tb, 1, sizeof(double), "tau");
    TAKE(vo, &vb, 1, sizeof(double), "val");
    TAKE(ro, &rb, 1, sizeof(double), "rho");
    const Py_ssize_t nrow = tb.len / (Py_ssize_t)sizeof(double);
    const Py_ssize_t nb = wb.len / (Py_ssize_t)sizeof(double);
    if (nfft < 4 || L < 1 || l0 < 0 || l0 + L > nfft || nt < 1 || width > nfft || iters < 0
        || cb.len != nrow * nfft * (Py_ssize_t)sizeof(float) || xb.len != cb.len
        || Cb.len != nrow * nb * 2 * (Py_ssize_t)sizeof(float) || w1b.len != wb.len || w2b.len != wb.len
        || vb.len != tb.len || rb.len != tb.len || (has_pref && pb.len != tb.len)) {
        PyErr_SetString(PyExc_ValueError, "match_pick: c and x must be len(tau) rows of nfft, C len(tau) rows of len(w) "
                                          "bins, lags l0..l0+L within a row");
        goto done;
    }
    /* per candidate: lag index j, start, parabola peak, order, kept; and one row of C in double */
    cand = (double *)malloc(sizeof(double) * (size_t)(5 * (L + 1)));
    rowbuf = (double *)malloc(sizeof(double) * (size_t)(2 * nb + 1));
    if (!cand || !rowbuf) {
        PyErr_NoMemory();
        goto done;
    }
    {
        const float *c = (const float *)cb.buf, *Cf = (const float *)Cb.buf, *xs = (const float *)xb.buf;
        const double *pref = has_pref ? (const double *)pb.buf : NULL;
        const double *w = (const double *)wb.buf, *w1 = (const double *)w1b.buf, *w2 = (const double *)w2b.buf;
        double *tau_out = (double *)tb.buf, *val_out = (double *)vb.buf, *rho_out = (double *)rb.buf;
        double *cj = cand, *cstart = cand + (L + 1), *cpv = cand + 2 * (L + 1), *ctau = cand + 3 * (L + 1),
               *cval = cand + 4 * (L + 1);
        Py_BEGIN_ALLOW_THREADS
        for (Py_ssize_t r = 0; r < nrow; r++) {
            const float *cr = c + r * nfft, *cl = cr + l0;
            float top = cl[0];
            Py_ssize_t am = 0;
            for (Py_ssize_t i = 1; i < L; i++)
                if (cl[i] > top) {
                    top = cl[i];
                    am = i;
                }
            /* the lobes refined: within `reach` of the top (a ring sampled only two or three times a
               cycle can hide its true peak between samples: its best sample, and its parabola, then
               read far lower than the peak) */
            const double reach = fmax(tie, refine);
            const float bar = (float)fmax(0.1, fmin(0.75, 1.0 - reach - 0.05)) * top;
            Py_ssize_t m = 0;
            int has_am = 0;
            for (Py_ssize_t i = 1; i + 1 < L; i++)
                if (cl[i] >= cl[i - 1] && cl[i] >= cl[i + 1] && cl[i] >= bar) {
                    cj[m++] = (double)(l0 + i);
                    has_am |= i == am;
                }
            if (!has_am)
                cj[m++] = (double)(l0 + am); /* the highest sample, after the lobes in order */
            /* three-point parabolas (float32, as numpy on float32 rows) */
            double top_p = -INFINITY;
            for (Py_ssize_t q = 0; q < m; q++) {
                const Py_ssize_t j = (Py_ssize_t)cj[q];
                const float y0 = cr[j >= 1 ? j - 1 : nfft - 1], y1 = cr[j], y2 = cr[(j + 1) % nfft];
                const float den = y0 - 2.0f * y1 + y2;
                const int conc = den < 0;
                const float safe = conc ? den : -1.0f;
                const float dy = y0 - y2;
                const float pv = conc ? y1 - (dy * dy) / (8.0f * safe) : y1;
                cstart[q] = conc ? (double)j + (double)((0.5f * dy) / safe) : (double)j;
                cpv[q] = (double)pv;
                if (cpv[q] > top_p)
                    top_p = cpv[q];
            }
            const double keep_bar = top_p - reach * fabs(top_p);
            const float *Cr = Cf + 2 * nb * r;
            for (Py_ssize_t k = 0; k < 2 * nb; k++)
                rowbuf[k] = (double)Cr[k];
            double row_best = -INFINITY;
            for (Py_ssize_t q = 0; q < m; q++) {
                if (!(cpv[q] >= keep_bar)) {
                    ctau[q] = NAN; /* not refined */
                    continue;
                }
                double v;
                double t = newton_one(rowbuf, nb, cstart[q], nfft, w, w1, w2, iters, &v);
                if (fabs(t - cj[q]) > 1.0) { /* Newton wandered: keep the integer peak */
                    t = cj[q];
                    v = (double)cr[(Py_ssize_t)cj[q]];
                }
                ctau[q] = t;
                cval[q] = v;
                if (v > row_best)
                    row_best = v;
            }
            /* the best refined lobe: near-ties (within tie, 3 % by default) nearest the preferred lag first, then
               the highest; the first in candidate order among equals */
            const double p = pref ? pref[r] : NAN;
            const int use_pref = isfinite(p);
            const double tie_bar = row_best - tie * fabs(row_best);
            Py_ssize_t best = -1;
            int best_tied = 0;
            double best_score = 0.0;
            for (Py_ssize_t q = 0; q < m; q++) {
                if (isnan(ctau[q]))
                    continue;
                const int tied = use_pref && cval[q] >= tie_bar;
                double score = tied ? fabs(ctau[q] - p) : -cval[q];
                if (isnan(score))
                    score = INFINITY; /* numpy's sort puts nan last */
                if (best < 0 || (tied && !best_tied) || (tied == best_tied && score < best_score)) {
                    best = q;
                    best_tied = tied;
                    best_score = score;
                }
            }
            const double t = ctau[best], v = cval[best];
            tau_out[r] = t;
            val_out[r] = v;
            /* the correlation coefficient: the matched part's energy from running sums in double of
               float32 squares (numpy's cumsum of x * x) */
            const double i0d = nearbyint(t);
            double rho = 0.0;
            if (i0d >= 0 && i0d + (double)nt <= (double)width) {
                const Py_ssize_t i0 = (Py_ssize_t)i0d;
                const float *xr = xs + r * nfft;
                double cs = 0.0, cs0 = 0.0;
                for (Py_ssize_t i = 0; i < i0 + nt; i++) {
                    if (i == i0)
                        cs0 = cs;
                    const float sq = xr[i] * xr[i];
                    cs += (double)sq;
                }
                const double den = sqrt(energy * (cs - cs0) + 1e-300);
                rho = den > 0 ? v / den : 0.0;
            }
            rho_out[r] = rho;
        }
        Py_END_ALLOW_THREADS
    }
    Py_INCREF(Py_None);
    result = Py_None;
done:
    free(cand);
    free(rowbuf);
    while (nheld)
        PyBuffer_Release(held[--nheld]);
    return result;
}

/* The detector's onset rule over a chunk's frames (ImpactDetector._onsets_numpy is the reference):
   a frame is a candidate when its 2 ms power beats its block's threshold and the power before it
   by the rise; a candidate starts an impact unless within the refractory time of the last one or in
   the quiet frames after a gap.  Writes the onset frames and their blocks' floors; returns
   (count, last onset frame). */
static PyObject *
onset_scan(PyObject *self, PyObject *args)
{
    PyObject *no, *bo, *to, *fo, *oo, *flo;
    Py_ssize_t sub, first_frame, ns, refr, last, quiet;
    double rise;
    if (!PyArg_ParseTuple(args, "OOOOndnnnnnOO", &no, &bo, &to, &fo, &sub, &rise, &first_frame, &ns, &refr, &last,
                          &quiet, &oo, &flo))
        return NULL;
    Py_buffer nb_, bb, tb, fb, ob, flb;
    Py_buffer *held[6];
    int nheld = 0;
    PyObject *result = NULL;
    TAKE(no, &nb_, 0, sizeof(double), "now");
    TAKE(bo, &bb, 0, sizeof(double), "bg");
    TAKE(to, &tb, 0, sizeof(double), "thr");
    TAKE(fo, &fb, 0, sizeof(double), "floor");
    TAKE(oo, &ob, 1, sizeof(long long), "onsets");
    TAKE(flo, &flb, 1, sizeof(double), "floors");
    {
        const Py_ssize_t nf = nb_.len / (Py_ssize_t)sizeof(double);
        const Py_ssize_t nblk = tb.len / (Py_ssize_t)sizeof(double);
        if (sub < 1 || bb.len != nb_.len || fb.len != tb.len || nblk * sub < nf || (nf && nblk < 1)
            || ob.len < nf * (Py_ssize_t)sizeof(long long) || flb.len < nf * (Py_ssize_t)sizeof(double)) {
            PyErr_SetString(PyExc_ValueError, "onset_scan: now and bg of one length, a threshold and floor per "
                                              "block of sub frames, outputs as long as now");
            goto done;
        }
        const double *now = (const double *)nb_.buf, *bg = (const double *)bb.buf;
        const double *thr = (const double *)tb.buf, *fl = (const double *)fb.buf;
        long long *on = (long long *)ob.buf;
        double *onfl = (double *)flb.buf;
        Py_ssize_t count = 0;
        for (Py_ssize_t c = 0; c < nf; c++) {
            const Py_ssize_t b = c / sub;
            if (!(now[c] > thr[b] && now[c] > bg[c] * rise + 0.5 * fl[b]))
                continue;
            const Py_ssize_t fi = first_frame + c - ns + 1; /* the summed window starts here */
            if (fi - last < refr || first_frame + c < quiet)
                continue;
            last = fi + ns - 1;
            on[count] = (long long)fi;
            onfl[count] = fl[b];
            count++;
        }
        result = Py_BuildValue("nn", count, last);
    }
done:
    while (nheld)
        PyBuffer_Release(held[--nheld]);
    return result;
}

static PyMethodDef methods[] = {
    {"newton_peaks", newton_peaks, METH_VARARGS,
     "newton_peaks(C, tau, val, w, w1, w2, nfft, iters): refine correlation maxima in place."},
    {"ringdown", ringdown, METH_VARARGS,
     "ringdown(x, samplerate, noise_power, start_db, stop_db, min_range_db, margin_db) -> "
     "(slope_db_per_s, fit_range_db, fit_rms_db) or None."},
    {"match_pick", match_pick, METH_VARARGS,
     "match_pick(c, C, x, l0, L, nt, width, prefer, energy, w, w1, w2, nfft, iters, tau, val, rho): "
     "timing.match_many's choice of lobe per row."},
    {"onset_scan", onset_scan, METH_VARARGS,
     "onset_scan(now, bg, thr, floor, sub, rise, first_frame, ns, refractory, last, quiet, onsets, floors) -> "
     "(count, last): the detector's onset rule over a chunk."},
    {"frame_power", frame_power, METH_VARARGS,
     "frame_power(x, head, lag, hop, out, kind, scale) -> (max, min, sum): mean power of x[n] - x[n-lag] "
     "per frame."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_kernels",
                                    "Compiled per-step loops of tickscope's analysis (see kernels.py).", -1, methods};

PyMODINIT_FUNC
PyInit__kernels(void)
{
    return PyModule_Create(&module);
}
