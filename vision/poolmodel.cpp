// The per-pixel loops of the rectified pool's mean–variance model: one
// pass each over the grid, where OpenCV's element-wise calls would take
// a dozen (see meanvar.go for what the model is and why). The loops run
// along each row's channels with OpenCV's universal intrinsics (intrin.hpp
// must be included for CV_SIMD to be set) and compute every value by the
// same expression, in the same order, as one pixel at a time would: the
// results are the same bits (poolmodel_test.go holds them to that).
#include "shim.h"

#include <algorithm>
#include <cmath>
#include <cstring>
#include <exception>
#include <stdexcept>
#include <vector>

#include <opencv2/core.hpp>
#include <opencv2/core/hal/intrin.hpp>

namespace {

void setErr(const std::exception& e, char* err, int errlen) {
    if (err == nullptr || errlen <= 0) return;
    std::strncpy(err, e.what(), errlen - 1);
    err[errlen - 1] = 0;
}

void need(const cv::Mat& m, int type, const cv::Size& size, const char* what) {
    if (m.type() != type || m.size() != size) {
        throw std::invalid_argument(std::string("pool model: ") + what + " has the wrong type or size");
    }
}

}  // namespace

int sw_pool_accumulate(void* framep, void* shortp, double a, char* err, int errlen) {
    try {
        const cv::Mat& f = *static_cast<cv::Mat*>(framep);
        cv::Mat& s = *static_cast<cv::Mat*>(shortp);
        if (f.type() != CV_8UC3) throw std::invalid_argument("pool model: frame is not 8-bit BGR");
        if (s.type() != CV_32FC3 || s.size() != f.size()) s.create(f.size(), CV_32FC3);
        const float fa = static_cast<float>(a), fb = 1.0f - fa;
        const int n = 3 * f.cols;
        for (int y = 0; y < f.rows; ++y) {
            const uchar* fp = f.ptr<uchar>(y);
            float* sp = s.ptr<float>(y);
            int x = 0;
#if CV_SIMD
            const int lanes = cv::v_float32::nlanes;
            const cv::v_float32 va = cv::vx_setall_f32(fa), vb = cv::vx_setall_f32(fb);
            for (; x <= n - lanes; x += lanes) {
                const cv::v_float32 v = cv::v_cvt_f32(cv::v_reinterpret_as_s32(cv::vx_load_expand_q(fp + x)));
                cv::v_store(sp + x, vb * cv::vx_load(sp + x) + va * v);
            }
#endif
            for (; x < n; ++x) sp[x] = fb * sp[x] + fa * static_cast<float>(fp[x]);
        }
        return 0;
    } catch (const std::exception& e) {
        setErr(e, err, errlen);
        return -1;
    }
}

int sw_pool_gain(void* shortp, void* meanp, void* weightp, int cellPx, double minShare, void* gainp, char* err, int errlen) {
    try {
        const cv::Mat& s = *static_cast<cv::Mat*>(shortp);
        const cv::Mat& m = *static_cast<cv::Mat*>(meanp);
        const cv::Mat& w = *static_cast<cv::Mat*>(weightp);
        cv::Mat& g = *static_cast<cv::Mat*>(gainp);
        const cv::Size size = s.size();
        need(s, CV_32FC3, size, "short mean");
        need(m, CV_32FC3, size, "mean");
        need(w, CV_8UC1, size, "weight");
        if (cellPx < 1) throw std::invalid_argument("pool model: gain cell under one pixel");
        if (g.type() != CV_32FC3 || g.size() != size) g.create(size, CV_32FC3);
        const int nx = (size.width + cellPx - 1) / cellPx, ny = (size.height + cellPx - 1) / cellPx;
        std::vector<double> ss(3 * nx * ny, 0.0), ms(3 * nx * ny, 0.0);
        std::vector<int> cnt(nx * ny, 0);
        // Per column: its cell, and where it falls between cell centres
        // (the same expressions as per pixel, computed once).
        // On the stack for grids up to 1 170 cells wide: no allocation per frame.
        cv::AutoBuffer<int, 4096> colInts(3 * size.width);
        int* cellX = colInts.data();
        int* x0s = cellX + size.width;
        int* x1s = x0s + size.width;
        const int n = 3 * size.width;
        cv::AutoBuffer<float, 8192> rowFloats(size.width + 2 * n);
        float* txs = rowFloats.data();
        for (int x = 0; x < size.width; ++x) {
            cellX[x] = x / cellPx;
            float fx = (x + 0.5f) / cellPx - 0.5f;
            fx = std::min(std::max(fx, 0.0f), static_cast<float>(nx - 1));
            x0s[x] = static_cast<int>(fx);
            x1s[x] = std::min(x0s[x] + 1, nx - 1);
            txs[x] = fx - x0s[x];
        }
        for (int y = 0; y < size.height; ++y) {
            const float* sp = s.ptr<float>(y);
            const float* mp = m.ptr<float>(y);
            const uchar* wp = w.ptr<uchar>(y);
            const int cy = y / cellPx;
            for (int x = 0; x < size.width; ++x) {
                if (!wp[x]) continue;
                const int k = cy * nx + cellX[x];
                cnt[k]++;
                for (int c = 0; c < 3; ++c) {
                    ss[3 * k + c] += sp[3 * x + c];
                    ms[3 * k + c] += mp[3 * x + c];
                }
            }
        }
        // Cell ratios; cells without enough weighted pixels are filled from
        // their neighbours, nearest first.
        std::vector<float> r(3 * nx * ny, 1.0f);
        std::vector<char> ok(nx * ny, 0);
        int have = 0;
        for (int cy = 0; cy < ny; ++cy) {
            for (int cx = 0; cx < nx; ++cx) {
                const int k = cy * nx + cx;
                const int cw = std::min(cellPx, size.width - cx * cellPx), ch = std::min(cellPx, size.height - cy * cellPx);
                if (cnt[k] < std::max(1.0, minShare * cw * ch)) continue;
                bool good = true;
                for (int c = 0; c < 3; ++c) {
                    if (!(ms[3 * k + c] > 1e-3 * cnt[k])) good = false;
                }
                if (!good) continue;
                for (int c = 0; c < 3; ++c) r[3 * k + c] = static_cast<float>(ss[3 * k + c] / ms[3 * k + c]);
                ok[k] = 1;
                have++;
            }
        }
        if (have > 0) {
            std::vector<char> next(ok);
            for (int pass = 0; have < nx * ny && pass < nx + ny; ++pass) {
                for (int cy = 0; cy < ny; ++cy) {
                    for (int cx = 0; cx < nx; ++cx) {
                        const int k = cy * nx + cx;
                        if (ok[k]) continue;
                        double acc[3] = {0, 0, 0};
                        int n = 0;
                        for (int dy = -1; dy <= 1; ++dy) {
                            for (int dx = -1; dx <= 1; ++dx) {
                                const int x2 = cx + dx, y2 = cy + dy;
                                if (x2 < 0 || y2 < 0 || x2 >= nx || y2 >= ny || !ok[y2 * nx + x2]) continue;
                                for (int c = 0; c < 3; ++c) acc[c] += r[3 * (y2 * nx + x2) + c];
                                n++;
                            }
                        }
                        if (n == 0) continue;
                        for (int c = 0; c < 3; ++c) r[3 * k + c] = static_cast<float>(acc[c] / n);
                        next[k] = 1;
                    }
                }
                have = 0;
                for (int k = 0; k < nx * ny; ++k) {
                    ok[k] = next[k];
                    have += ok[k];
                }
            }
        }
        // Bilinear between cell centres, clamped at the border: first along
        // the row of cell centres above and the row below (the same for
        // every grid row between them), then between the two.
        float* above = txs + size.width;
        float* below = above + n;
        int rows = -1;
        for (int y = 0; y < size.height; ++y) {
            float fy = (y + 0.5f) / cellPx - 0.5f;
            fy = std::min(std::max(fy, 0.0f), static_cast<float>(ny - 1));
            const int y0 = static_cast<int>(fy), y1 = std::min(y0 + 1, ny - 1);
            const float ty = fy - y0;
            if (y0 != rows) {
                for (int x = 0; x < size.width; ++x) {
                    const int x0 = x0s[x], x1 = x1s[x];
                    const float tx = txs[x];
                    for (int c = 0; c < 3; ++c) {
                        above[3 * x + c] = r[3 * (y0 * nx + x0) + c] * (1 - tx) + r[3 * (y0 * nx + x1) + c] * tx;
                        below[3 * x + c] = r[3 * (y1 * nx + x0) + c] * (1 - tx) + r[3 * (y1 * nx + x1) + c] * tx;
                    }
                }
                rows = y0;
            }
            const float wa = 1 - ty;
            float* gp = g.ptr<float>(y);
            int i = 0;
#if CV_SIMD
            const int lanes = cv::v_float32::nlanes;
            const cv::v_float32 va = cv::vx_setall_f32(wa), vb = cv::vx_setall_f32(ty);
            for (; i <= n - lanes; i += lanes) cv::v_store(gp + i, cv::vx_load(above + i) * va + cv::vx_load(below + i) * vb);
#endif
            for (; i < n; ++i) gp[i] = above[i] * wa + below[i] * ty;
        }
        return 0;
    } catch (const std::exception& e) {
        setErr(e, err, errlen);
        return -1;
    }
}

int sw_pool_glint(void* framep, void* ratep, void* prevp, double a, int level, char* err, int errlen) {
    try {
        const cv::Mat& f = *static_cast<cv::Mat*>(framep);
        cv::Mat& r = *static_cast<cv::Mat*>(ratep);
        cv::Mat& prev = *static_cast<cv::Mat*>(prevp);
        if (f.type() != CV_8UC3) throw std::invalid_argument("pool model: frame is not 8-bit BGR");
        if (r.type() != CV_32FC1 || r.size() != f.size()) {
            r.create(f.size(), CV_32FC1);
            r.setTo(0);
        }
        if (prev.type() != CV_8UC1 || prev.size() != f.size()) {
            prev.create(f.size(), CV_8UC1);
            prev.setTo(0);
        }
        const float fa = static_cast<float>(a);
        for (int y = 0; y < f.rows; ++y) {
            const uchar* fp = f.ptr<uchar>(y);
            float* rp = r.ptr<float>(y);
            uchar* pp = prev.ptr<uchar>(y);
            int x = 0;
#if CV_SIMD
            // A channel at or above level is the brightest one being so;
            // levels outside 1–255 are left to the loop below.
            if (level >= 1 && level <= 255) {
                const int bytes = cv::v_uint8::nlanes, lanes = cv::v_float32::nlanes;
                const cv::v_uint8 vLevel = cv::vx_setall_u8(static_cast<uchar>(level)), bit = cv::vx_setall_u8(1);
                const cv::v_float32 va = cv::vx_setall_f32(fa), zero = cv::vx_setzero_f32(), one = cv::vx_setall_f32(1.0f);
                for (; x <= f.cols - bytes; x += bytes) {
                    cv::v_uint8 b, g, rr;
                    cv::v_load_deinterleave(fp + 3 * x, b, g, rr);
                    const cv::v_uint8 on = cv::v_max(cv::v_max(b, g), rr) >= vLevel;
                    const cv::v_uint8 now = on & bit;
                    const cv::v_uint8 was = cv::vx_load(pp + x);
                    cv::v_store(pp + x, now);
                    // 1 where the pixel toggled, 0 where not, widened to floats.
                    cv::v_uint16 t16[2];
                    cv::v_expand(now ^ was, t16[0], t16[1]);
                    for (int h = 0; h < 2; ++h) {
                        cv::v_uint32 t32[2];
                        cv::v_expand(t16[h], t32[0], t32[1]);
                        for (int q = 0; q < 2; ++q) {
                            float* rq = rp + x + (2 * h + q) * lanes;
                            const cv::v_float32 toggled = cv::v_reinterpret_as_f32(t32[q] != cv::vx_setzero_u32());
                            const cv::v_float32 rv = cv::vx_load(rq);
                            cv::v_store(rq, rv + va * (cv::v_select(toggled, one, zero) - rv));
                        }
                    }
                }
            }
#endif
            for (; x < f.cols; ++x) {
                const uchar g = (fp[3 * x] >= level || fp[3 * x + 1] >= level || fp[3 * x + 2] >= level) ? 1 : 0;
                rp[x] += fa * ((g != pp[x] ? 1.0f : 0.0f) - rp[x]);
                pp[x] = g;
            }
        }
        return 0;
    } catch (const std::exception& e) {
        setErr(e, err, errlen);
        return -1;
    }
}

int sw_pool_update(void* imgp, void* meanp, void* varp, void* gainp, void* waterp, void* holdp, void* extrap, void* glintp,
                   SwPoolParams p, void* scorep, void* contrastp, char* err, int errlen) {
    try {
        const cv::Mat& img = *static_cast<cv::Mat*>(imgp);
        cv::Mat& m = *static_cast<cv::Mat*>(meanp);
        cv::Mat& v = *static_cast<cv::Mat*>(varp);
        const cv::Mat& g = *static_cast<cv::Mat*>(gainp);
        const cv::Mat& water = *static_cast<cv::Mat*>(waterp);
        const cv::Mat& hold = *static_cast<cv::Mat*>(holdp);
        const cv::Mat& extra = *static_cast<cv::Mat*>(extrap);
        const cv::Mat& glint = *static_cast<cv::Mat*>(glintp);
        const bool hasExtra = !extra.empty(), hasGlint = !glint.empty();
        cv::Mat& score = *static_cast<cv::Mat*>(scorep);
        cv::Mat& con = *static_cast<cv::Mat*>(contrastp);
        const cv::Size size = m.size();
        const bool img8 = img.type() == CV_8UC3;
        if (!img8) need(img, CV_32FC3, size, "image");
        if (img.size() != size) throw std::invalid_argument("pool model: image has the wrong size");
        need(m, CV_32FC3, size, "mean");
        need(v, CV_32FC3, size, "variance");
        need(g, CV_32FC3, size, "gain");
        need(water, CV_8UC1, size, "water mask");
        need(hold, CV_8UC1, size, "hold mask");
        if (hasExtra) need(extra, CV_32FC3, size, "extra variance");
        if (hasGlint) need(glint, CV_32FC1, size, "glint rate");
        if (score.type() != CV_32FC1 || score.size() != size) score.create(size, CV_32FC1);
        if (con.type() != CV_32FC1 || con.size() != size) con.create(size, CV_32FC1);
        const float noise2 = static_cast<float>(p.noise2);
        const float aBg = static_cast<float>(p.aMean), aFg = static_cast<float>(p.aSlow);
        const float below = static_cast<float>(p.learnBelow);
        const float varClip = p.varClip, varGain = p.varGain, floorGain = 1e-3f;
        // Three passes per row. The first and last run along the row's
        // channels without branches; the middle one takes whole pixels
        // (the sums of their channels, the masks, the decisions). Each runs
        // in vectors where OpenCV's universal intrinsics have them, and a
        // scalar loop finishes the row. Every value is computed by the same
        // expression, in the same order, as one pass per pixel would:
        // vectors only compute several pixels at once.
        const int n = 3 * size.width;
        // On the stack for grids up to 682 cells wide: no allocation per frame.
        cv::AutoBuffer<float, 8192> rowBuf(4 * n);
        float* pxRow = rowBuf.data();  // the image row as float (8-bit images)
        float* termRow = pxRow + n;    // each channel's squared, normalised residual
        float* expRow = termRow + n;   // each channel's expected value, gain times mean
        float* rateRow = expRow + n;   // each channel's learning rate; 0 where it does not learn
#if CV_SIMD
        const int lanes = cv::v_float32::nlanes;
#endif
        for (int y = 0; y < size.height; ++y) {
            const float* px;
            if (img8) {
                const uchar* ip8 = img.ptr<uchar>(y);
                for (int i = 0; i < n; ++i) pxRow[i] = static_cast<float>(ip8[i]);
                px = pxRow;
            } else {
                px = img.ptr<float>(y);
            }
            float* mp = m.ptr<float>(y);
            float* vp = v.ptr<float>(y);
            const float* gp = g.ptr<float>(y);
            const uchar* wp = water.ptr<uchar>(y);
            const uchar* hp = hold.ptr<uchar>(y);
            float* sp = score.ptr<float>(y);
            float* cp = con.ptr<float>(y);
            const float* ep = hasExtra ? extra.ptr<float>(y) : nullptr;
            const float* gr = hasGlint ? glint.ptr<float>(y) : nullptr;

            // Pass 1: residual terms, every channel of the row.
            int i = 0;
#if CV_SIMD
            {
                const cv::v_float32 vn2 = cv::vx_setall_f32(noise2), zero = cv::vx_setzero_f32();
                for (; i <= n - lanes; i += lanes) {
                    const cv::v_float32 gc = cv::vx_load(gp + i);
                    const cv::v_float32 e = gc * cv::vx_load(mp + i);
                    const cv::v_float32 r = cv::vx_load(px + i) - e;
                    const cv::v_float32 vv = cv::vx_load(vp + i) + (ep ? cv::vx_load(ep + i) : zero);
                    cv::v_store(expRow + i, e);
                    cv::v_store(termRow + i, r * r / (gc * gc * vv + vn2));
                }
            }
#endif
            for (; i < n; ++i) {
                const float gc = gp[i];
                const float e = gc * mp[i];
                const float r = px[i] - e;
                const float vv = vp[i] + (ep ? ep[i] : 0.0f);
                expRow[i] = e;
                termRow[i] = r * r / (gc * gc * vv + noise2);
            }

            // Pass 2: each pixel's score, contrast and learning rate.
            bool any = false;
            int x = 0;
#if CV_SIMD
            {
                const cv::v_float32 zero = cv::vx_setzero_f32(), one = cv::vx_setall_f32(1.0f);
                const cv::v_float32 vBelow = cv::vx_setall_f32(below), vBg = cv::vx_setall_f32(aBg), vFg = cv::vx_setall_f32(aFg);
                const cv::v_float32 vGlint = cv::vx_setall_f32(p.glintMin);
                const cv::v_uint32 none = cv::vx_setzero_u32();
                for (; x <= size.width - lanes; x += lanes) {
                    const int k = 3 * x;
                    cv::v_float32 t0, t1, t2, p0, p1, p2, e0, e1, e2;
                    cv::v_load_deinterleave(termRow + k, t0, t1, t2);
                    cv::v_load_deinterleave(px + k, p0, p1, p2);
                    cv::v_load_deinterleave(expRow + k, e0, e1, e2);
                    const cv::v_float32 d = zero + t0 + t1 + t2;
                    const cv::v_float32 sum = zero + p0 + p1 + p2;
                    const cv::v_float32 sumExp = zero + e0 + e1 + e2;
                    const cv::v_float32 wet = cv::v_reinterpret_as_f32(cv::vx_load_expand_q(wp + x) != none);
                    cv::v_float32 sc = d;
                    if (gr) sc = cv::v_select((cv::vx_load(gr + x) >= vGlint) & (sum > sumExp), zero, d);
                    sc = cv::v_select(wet, sc, zero);
                    const cv::v_float32 co = cv::v_select(sumExp > one, (sum - sumExp) / sumExp, zero);
                    cv::v_store(sp + x, sc);
                    cv::v_store(cp + x, cv::v_select(wet, co, zero));
                    cv::v_float32 a = zero;
                    if (p.learn) {
                        const cv::v_float32 unheld = cv::v_reinterpret_as_f32(cv::vx_load_expand_q(hp + x) == none);
                        a = cv::v_select(wet & unheld, cv::v_select(sc < vBelow, vBg, vFg), zero);
                        a = cv::v_select(a > zero, a, zero);
                    }
                    any = any || cv::v_check_any(a > zero);
                    cv::v_store_interleave(rateRow + k, a, a, a);
                }
            }
#endif
            for (; x < size.width; ++x) {
                const int k = 3 * x;
                if (!wp[x]) {
                    sp[x] = 0;
                    cp[x] = 0;
                    rateRow[k] = rateRow[k + 1] = rateRow[k + 2] = 0;
                    continue;
                }
                float d = 0, sum = 0, sumExp = 0;
                for (int c = 0; c < 3; ++c) {
                    d += termRow[k + c];
                    sum += px[k + c];
                    sumExp += expRow[k + c];
                }
                // Glittering water: only a darkening can be a body.
                sp[x] = (gr && gr[x] >= p.glintMin && sum > sumExp) ? 0.0f : d;
                cp[x] = sumExp > 1.0f ? (sum - sumExp) / sumExp : 0.0f;
                float a = 0;
                if (p.learn && !hp[x]) a = sp[x] < below ? aBg : aFg;
                if (!(a > 0)) a = 0;
                any = any || a > 0;
                rateRow[k] = rateRow[k + 1] = rateRow[k + 2] = a;
            }
            if (!any) continue;

            // Pass 3: mean and variance learn where the rate is above 0.
            i = 0;
#if CV_SIMD
            {
                const cv::v_float32 zero = cv::vx_setzero_f32(), one = cv::vx_setall_f32(1.0f);
                const cv::v_float32 vn2 = cv::vx_setall_f32(noise2), vClip = cv::vx_setall_f32(varClip);
                const cv::v_float32 vGain = cv::vx_setall_f32(varGain), vFloor = cv::vx_setall_f32(floorGain);
                for (; i <= n - lanes; i += lanes) {
                    const cv::v_float32 a = cv::vx_load(rateRow + i);
                    const cv::v_float32 on = a > zero;
                    if (!cv::v_check_any(on)) continue;
                    const cv::v_float32 ag = a * vGain;
                    const cv::v_float32 av = cv::v_select(ag < one, ag, one);
                    const cv::v_float32 g0 = cv::vx_load(gp + i);
                    const cv::v_float32 gc = cv::v_select(g0 > vFloor, g0, vFloor);
                    const cv::v_float32 m0 = cv::vx_load(mp + i), v0 = cv::vx_load(vp + i);
                    const cv::v_float32 r = cv::vx_load(px + i) / gc - m0;
                    const cv::v_float32 cap = vClip * (v0 + vn2);
                    const cv::v_float32 rr = r * r;
                    const cv::v_float32 clipped = cv::v_select(cap < rr, cap, rr);
                    cv::v_store(mp + i, cv::v_select(on, m0 + a * r, m0));
                    cv::v_store(vp + i, cv::v_select(on, v0 + av * (clipped - v0), v0));
                }
            }
#endif
            for (; i < n; ++i) {
                const float a = rateRow[i];
                if (!(a > 0)) continue;
                const float av = std::min(1.0f, a * varGain);
                const float gc = gp[i] > floorGain ? gp[i] : floorGain;
                const float r = px[i] / gc - mp[i];
                mp[i] += a * r;
                // Winsorised: one event cannot blow the variance up.
                const float cap = varClip * (vp[i] + noise2);
                vp[i] += av * (std::min(r * r, cap) - vp[i]);
            }
        }
        return 0;
    } catch (const std::exception& e) {
        setErr(e, err, errlen);
        return -1;
    }
}
