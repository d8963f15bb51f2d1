// Work on a decoded frame's own Y, Cb and Cr planes, so that a camera's
// full-size frame is never converted to BGR just to be shrunk or sampled:
// the picture checks' grey probe is the Y plane averaged down, and the
// pool grid is the three planes remapped onto it, converted to BGR only
// at the grid's cells. The conversion is BT.601's (ITU-R BT.601-7, the
// matrix swscale assumes unless told otherwise): limited range, Y 16–235
// and chroma 16–240, for the usual formats, full range for the JPEG ones.
#include "shim.h"

#include <cmath>
#include <cstdio>
#include <cstring>
#include <exception>

#include <opencv2/core.hpp>
#include <opencv2/imgproc.hpp>

namespace {

void planeErr(const std::exception& e, char* err, int errlen) {
    if (err == nullptr || errlen <= 0) return;
    std::strncpy(err, e.what(), errlen - 1);
    err[errlen - 1] = 0;
}

// lumaLevel is the grey level of luma y: 255/219 (y − 16), rounded and
// clipped, for limited range; y itself for full range. BGR to grey with
// BT.601's weights (0.299, 0.587, 0.114, OpenCV's) of a pixel converted
// with the matrix below gives back exactly that before rounding: the
// chroma terms cancel.
int lumaLevel(int y, int full) {
    if (full) return y;
    long v = std::lround((y - 16) * 255.0 / 219.0);
    return v < 0 ? 0 : v > 255 ? 255 : static_cast<int>(v);
}

}  // namespace

int sw_plane_grey(const unsigned char* y, int step, int w, int h, int dw, int dh, int full, void* dstp, char* err, int errlen) {
    try {
        if (w <= 0 || h <= 0 || dw <= 0 || dh <= 0 || dw > w || dh > h || step < w) {
            std::snprintf(err, errlen, "plane grey: %dx%d plane (%d bytes a row) to %dx%d", w, h, step, dw, dh);
            return -1;
        }
        cv::Mat src(h, w, CV_8UC1, const_cast<unsigned char*>(y), step);
        cv::Mat& dst = *static_cast<cv::Mat*>(dstp);
        const int f = w / dw;
        if (dw == w && dh == h) {
            src.copyTo(dst);
        } else if (f > 2 && w == f * dw && h == f * dh) {
            if (sw_area_shrink(&src, f, &dst, err, errlen) != 0) return -1;
        } else {
            cv::resize(src, dst, cv::Size(dw, dh), 0, 0, cv::INTER_AREA);
        }
        if (!full) {
            uchar lut[256];
            for (int i = 0; i < 256; i++) lut[i] = static_cast<uchar>(lumaLevel(i, 0));
            for (int r = 0; r < dst.rows; r++) {
                uchar* d = dst.ptr<uchar>(r);
                for (int c = 0; c < dst.cols; c++) d[c] = lut[d[c]];
            }
        }
        return 0;
    } catch (const std::exception& e) {
        planeErr(e, err, errlen);
        return -1;
    }
}

int sw_fixed_maps(void* mapXp, void* mapYp, void* m1p, void* m2p, char* err, int errlen) {
    try {
        cv::convertMaps(*static_cast<const cv::Mat*>(mapXp), *static_cast<const cv::Mat*>(mapYp), *static_cast<cv::Mat*>(m1p),
                        *static_cast<cv::Mat*>(m2p), CV_16SC2, false);
        return 0;
    } catch (const std::exception& e) {
        planeErr(e, err, errlen);
        return -1;
    }
}

int sw_yuv_remap(const unsigned char* y, int ystep, const unsigned char* cb, int cbstep, const unsigned char* cr, int crstep,
                 int w, int h, int sx, int sy, int full, void* mapXp, void* mapYp, void* cmapXp, void* cmapYp,
                 void* gyp, void* gcbp, void* gcrp, void* dstp, char* err, int errlen) {
    try {
        const int cw = (w + (1 << sx) - 1) >> sx, ch = (h + (1 << sy) - 1) >> sy;
        if (w <= 0 || h <= 0 || sx < 0 || sx > 2 || sy < 0 || sy > 2 || ystep < w || cbstep < cw || crstep < cw) {
            std::snprintf(err, errlen, "yuv remap: %dx%d planes, chroma shifts %d, %d, rows of %d, %d, %d bytes", w, h, sx, sy, ystep, cbstep, crstep);
            return -1;
        }
        const cv::Mat Y(h, w, CV_8UC1, const_cast<unsigned char*>(y), ystep);
        const cv::Mat Cb(ch, cw, CV_8UC1, const_cast<unsigned char*>(cb), cbstep);
        const cv::Mat Cr(ch, cw, CV_8UC1, const_cast<unsigned char*>(cr), crstep);
        const cv::Mat& mapX = *static_cast<const cv::Mat*>(mapXp);
        const cv::Mat& mapY = *static_cast<const cv::Mat*>(mapYp);
        const cv::Mat& cmapX = *static_cast<const cv::Mat*>(cmapXp);
        const cv::Mat& cmapY = *static_cast<const cv::Mat*>(cmapYp);
        cv::Mat& gy = *static_cast<cv::Mat*>(gyp);
        cv::Mat& gcb = *static_cast<cv::Mat*>(gcbp);
        cv::Mat& gcr = *static_cast<cv::Mat*>(gcrp);
        cv::Mat& dst = *static_cast<cv::Mat*>(dstp);
        cv::remap(Y, gy, mapX, mapY, cv::INTER_LINEAR, cv::BORDER_REPLICATE);
        cv::remap(Cb, gcb, cmapX, cmapY, cv::INTER_LINEAR, cv::BORDER_REPLICATE);
        cv::remap(Cr, gcr, cmapX, cmapY, cv::INTER_LINEAR, cv::BORDER_REPLICATE);

        // BT.601: R = Y' + 1.402 Cr', G = Y' − 0.344136 Cb' − 0.714136 Cr',
        // B = Y' + 1.772 Cb', with Y' and the chroma scaled to 0–255 and
        // ±127.5; in 16.16 fixed point, as tables per plane.
        const double ky = full ? 1.0 : 255.0 / 219.0, kc = full ? 1.0 : 255.0 / 224.0;
        const int y0 = full ? 0 : 16;
        int tY[256], tRV[256], tGU[256], tGV[256], tBU[256];
        for (int i = 0; i < 256; i++) {
            const double c = kc * (i - 128);
            tY[i] = static_cast<int>(std::lround(ky * (i - y0) * 65536.0)) + 32768;
            tRV[i] = static_cast<int>(std::lround(1.402 * c * 65536.0));
            tGU[i] = static_cast<int>(std::lround(-0.344136 * c * 65536.0));
            tGV[i] = static_cast<int>(std::lround(-0.714136 * c * 65536.0));
            tBU[i] = static_cast<int>(std::lround(1.772 * c * 65536.0));
        }
        dst.create(gy.rows, gy.cols, CV_8UC3);
        for (int r = 0; r < gy.rows; r++) {
            const uchar* py = gy.ptr<uchar>(r);
            const uchar* pu = gcb.ptr<uchar>(r);
            const uchar* pv = gcr.ptr<uchar>(r);
            uchar* o = dst.ptr<uchar>(r);
            for (int c = 0; c < gy.cols; c++) {
                const int l = tY[py[c]], u = pu[c], v = pv[c];
                o[3 * c + 0] = cv::saturate_cast<uchar>((l + tBU[u]) >> 16);
                o[3 * c + 1] = cv::saturate_cast<uchar>((l + tGU[u] + tGV[v]) >> 16);
                o[3 * c + 2] = cv::saturate_cast<uchar>((l + tRV[v]) >> 16);
            }
        }
        return 0;
    } catch (const std::exception& e) {
        planeErr(e, err, errlen);
        return -1;
    }
}
