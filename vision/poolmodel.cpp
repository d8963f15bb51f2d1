// The per-pixel loops of the rectified pool's mean–variance model: one
// pass each over the grid, where OpenCV's element-wise calls would take
// a dozen (see meanvar.go for what the model is and why).
#include "shim.h"

#include <algorithm>
#include <cmath>
#include <cstring>
#include <exception>
#include <stdexcept>
#include <vector>

#include <opencv2/core.hpp>

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
        for (int y = 0; y < f.rows; ++y) {
            const uchar* fp = f.ptr<uchar>(y);
            float* sp = s.ptr<float>(y);
            for (int x = 0; x < 3 * f.cols; ++x) sp[x] = fb * sp[x] + fa * static_cast<float>(fp[x]);
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
        for (int y = 0; y < size.height; ++y) {
            const float* sp = s.ptr<float>(y);
            const float* mp = m.ptr<float>(y);
            const uchar* wp = w.ptr<uchar>(y);
            const int cy = y / cellPx;
            for (int x = 0; x < size.width; ++x) {
                if (!wp[x]) continue;
                const int k = cy * nx + x / cellPx;
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
        // Bilinear between cell centres, clamped at the border.
        for (int y = 0; y < size.height; ++y) {
            float fy = (y + 0.5f) / cellPx - 0.5f;
            fy = std::min(std::max(fy, 0.0f), static_cast<float>(ny - 1));
            const int y0 = static_cast<int>(fy), y1 = std::min(y0 + 1, ny - 1);
            const float ty = fy - y0;
            float* gp = g.ptr<float>(y);
            for (int x = 0; x < size.width; ++x) {
                float fx = (x + 0.5f) / cellPx - 0.5f;
                fx = std::min(std::max(fx, 0.0f), static_cast<float>(nx - 1));
                const int x0 = static_cast<int>(fx), x1 = std::min(x0 + 1, nx - 1);
                const float tx = fx - x0;
                for (int c = 0; c < 3; ++c) {
                    const float a = r[3 * (y0 * nx + x0) + c] * (1 - tx) + r[3 * (y0 * nx + x1) + c] * tx;
                    const float b = r[3 * (y1 * nx + x0) + c] * (1 - tx) + r[3 * (y1 * nx + x1) + c] * tx;
                    gp[3 * x + c] = a * (1 - ty) + b * ty;
                }
            }
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
            for (int x = 0; x < f.cols; ++x) {
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
        for (int y = 0; y < size.height; ++y) {
            const uchar* ip8 = img8 ? img.ptr<uchar>(y) : nullptr;
            const float* ipf = img8 ? nullptr : img.ptr<float>(y);
            float* mp = m.ptr<float>(y);
            float* vp = v.ptr<float>(y);
            const float* gp = g.ptr<float>(y);
            const uchar* wp = water.ptr<uchar>(y);
            const uchar* hp = hold.ptr<uchar>(y);
            float* sp = score.ptr<float>(y);
            float* cp = con.ptr<float>(y);
            const float* ep = hasExtra ? extra.ptr<float>(y) : nullptr;
            const float* gr = hasGlint ? glint.ptr<float>(y) : nullptr;
            for (int x = 0; x < size.width; ++x) {
                if (!wp[x]) {
                    sp[x] = 0;
                    cp[x] = 0;
                    continue;
                }
                float d = 0, sum = 0, sumExp = 0;
                float px[3];
                for (int c = 0; c < 3; ++c) {
                    const int i = 3 * x + c;
                    px[c] = img8 ? static_cast<float>(ip8[i]) : ipf[i];
                    const float gc = gp[i];
                    const float e = gc * mp[i];
                    const float r = px[c] - e;
                    const float v = vp[i] + (ep ? ep[i] : 0.0f);
                    d += r * r / (gc * gc * v + noise2);
                    sum += px[c];
                    sumExp += e;
                }
                // Glittering water: only a darkening can be a body.
                sp[x] = (gr && gr[x] >= p.glintMin && sum > sumExp) ? 0.0f : d;
                cp[x] = sumExp > 1.0f ? (sum - sumExp) / sumExp : 0.0f;
                if (!p.learn || hp[x]) continue;
                const float a = sp[x] < below ? aBg : aFg;
                if (a <= 0) continue;
                const float av = std::min(1.0f, a * p.varGain);
                for (int c = 0; c < 3; ++c) {
                    const int i = 3 * x + c;
                    const float gc = gp[i] > 1e-3f ? gp[i] : 1e-3f;
                    const float r = px[c] / gc - mp[i];
                    mp[i] += a * r;
                    // Winsorised: one event cannot blow the variance up.
                    const float cap = p.varClip * (vp[i] + noise2);
                    vp[i] += av * (std::min(r * r, cap) - vp[i]);
                }
            }
        }
        return 0;
    } catch (const std::exception& e) {
        setErr(e, err, errlen);
        return -1;
    }
}
