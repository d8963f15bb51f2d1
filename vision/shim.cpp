#include "shim.h"

#include <dlfcn.h>
#include <malloc.h>
#include <setjmp.h>
#include <stdio.h>
#include <unistd.h>

#include <jpeglib.h>

#include <algorithm>
#include <cstdarg>
#include <cstdint>
#include <cstring>
#include <exception>
#include <mutex>
#include <string>
#include <vector>

#include <opencv2/core.hpp>
#include <opencv2/core/hal/intrin.hpp>
#include <opencv2/video/background_segm.hpp>
#include <opencv2/videoio.hpp>

namespace {

struct Background {
    cv::Ptr<cv::BackgroundSubtractor> sub;
};

void copyErr(const std::exception& e, char* err, int errlen) {
    if (err == nullptr || errlen <= 0) return;
    std::strncpy(err, e.what(), errlen - 1);
    err[errlen - 1] = 0;
}

// libavutil's logging entry points (stable since libavutil 55), looked up
// in the process rather than linked, so that building needs no FFmpeg
// headers.
typedef void (*AvLogCallback)(void*, int, const char*, va_list);
typedef void (*AvLogSetCallback)(AvLogCallback);
typedef int (*AvLogFormatLine2)(void*, int, const char*, va_list, char*, int, int*);
typedef int (*AvLogGetLevel)(void);

struct LogForward {
    std::mutex mu;
    int fd = -1;
    int printPrefix = 1;
    std::string pending;  // a line FFmpeg has not finished yet
    AvLogSetCallback setCallback = nullptr;
    AvLogCallback defaultCallback = nullptr;
    AvLogFormatLine2 formatLine = nullptr;
    AvLogGetLevel getLevel = nullptr;
};

LogForward& logForward() {
    static LogForward lf;
    return lf;
}

void forwardLog(void* avcl, int level, const char* fmt, va_list vl) {
    LogForward& lf = logForward();
    // FFmpeg leaves the level check to the callback (its default one
    // does it too); OpenCV sets the level.
    if (level > lf.getLevel()) return;
    char line[1024];
    std::lock_guard<std::mutex> lock(lf.mu);
    if (lf.fd < 0) return;
    lf.formatLine(avcl, level, fmt, vl, line, sizeof line, &lf.printPrefix);
    lf.pending += line;
    for (size_t nl; (nl = lf.pending.find('\n')) != std::string::npos;) {
        std::string out = std::to_string(level) + " " + lf.pending.substr(0, nl) + "\n";
        if (write(lf.fd, out.data(), out.size()) < 0) {
            // The reader is behind: the line is dropped, FFmpeg never waits.
        }
        lf.pending.erase(0, nl + 1);
    }
    if (lf.pending.size() > 4096) lf.pending.clear();
}

}  // namespace

int sw_log_forward(int fd) {
    LogForward& lf = logForward();
    std::lock_guard<std::mutex> lock(lf.mu);
    if (lf.setCallback == nullptr) {
        lf.setCallback = reinterpret_cast<AvLogSetCallback>(dlsym(RTLD_DEFAULT, "av_log_set_callback"));
        lf.defaultCallback = reinterpret_cast<AvLogCallback>(dlsym(RTLD_DEFAULT, "av_log_default_callback"));
        lf.formatLine = reinterpret_cast<AvLogFormatLine2>(dlsym(RTLD_DEFAULT, "av_log_format_line2"));
        lf.getLevel = reinterpret_cast<AvLogGetLevel>(dlsym(RTLD_DEFAULT, "av_log_get_level"));
    }
    if (lf.setCallback == nullptr || lf.defaultCallback == nullptr || lf.formatLine == nullptr || lf.getLevel == nullptr) {
        return -1;
    }
    lf.fd = fd;
    lf.pending.clear();
    lf.printPrefix = 1;
    lf.setCallback(fd >= 0 ? forwardLog : lf.defaultCallback);
    return 0;
}

SwBackground sw_bg_new(int kind, int history, double threshold, int shadows) {
    auto* b = new Background;
    if (kind == 1) {
        b->sub = cv::createBackgroundSubtractorKNN(history, threshold, shadows != 0);
    } else {
        b->sub = cv::createBackgroundSubtractorMOG2(history, threshold, shadows != 0);
    }
    return b;
}

int sw_bg_apply(SwBackground b, void* image, void* fgmask, double learningRate, char* err, int errlen) {
    try {
        auto* bg = static_cast<Background*>(b);
        bg->sub->apply(*static_cast<cv::Mat*>(image), *static_cast<cv::Mat*>(fgmask), learningRate);
        return 0;
    } catch (const std::exception& e) {
        copyErr(e, err, errlen);
        return -1;
    }
}

int sw_bg_background(SwBackground b, void* dst, char* err, int errlen) {
    try {
        auto* bg = static_cast<Background*>(b);
        bg->sub->getBackgroundImage(*static_cast<cv::Mat*>(dst));
        return 0;
    } catch (const std::exception& e) {
        copyErr(e, err, errlen);
        return -1;
    }
}

void sw_bg_close(SwBackground b) { delete static_cast<Background*>(b); }

SwCapture sw_cap_open(const char* uri, int api, int openTimeoutMs, int readTimeoutMs, char* err, int errlen) {
    try {
        std::vector<int> params;
        if (openTimeoutMs > 0) {
            params.push_back(cv::CAP_PROP_OPEN_TIMEOUT_MSEC);
            params.push_back(openTimeoutMs);
        }
        if (readTimeoutMs > 0) {
            params.push_back(cv::CAP_PROP_READ_TIMEOUT_MSEC);
            params.push_back(readTimeoutMs);
        }
        auto* c = new cv::VideoCapture();
        if (!c->open(std::string(uri), api, params)) {
            delete c;
            if (err != nullptr && errlen > 0) {
                std::strncpy(err, "no backend could open the source", errlen - 1);
                err[errlen - 1] = 0;
            }
            return nullptr;
        }
        return c;
    } catch (const std::exception& e) {
        copyErr(e, err, errlen);
        return nullptr;
    }
}

int sw_cap_read(SwCapture c, void* dst, char* err, int errlen) {
    try {
        return static_cast<cv::VideoCapture*>(c)->read(*static_cast<cv::Mat*>(dst)) ? 1 : 0;
    } catch (const std::exception& e) {
        copyErr(e, err, errlen);
        return -1;
    }
}

int sw_cap_grab(SwCapture c, char* err, int errlen) {
    try {
        return static_cast<cv::VideoCapture*>(c)->grab() ? 1 : 0;
    } catch (const std::exception& e) {
        copyErr(e, err, errlen);
        return -1;
    }
}

int sw_cap_retrieve(SwCapture c, void* dst, char* err, int errlen) {
    try {
        return static_cast<cv::VideoCapture*>(c)->retrieve(*static_cast<cv::Mat*>(dst)) ? 1 : 0;
    } catch (const std::exception& e) {
        copyErr(e, err, errlen);
        return -1;
    }
}

double sw_cap_get(SwCapture c, int prop) { return static_cast<cv::VideoCapture*>(c)->get(prop); }

void sw_cap_close(SwCapture c) { delete static_cast<cv::VideoCapture*>(c); }

void sw_set_threads(int n) { cv::setNumThreads(n); }

int sw_get_threads(void) { return cv::getNumThreads(); }

int sw_malloc_arenas(int n, int mmapThreshold) {
    return mallopt(M_ARENA_MAX, n) == 1 && mallopt(M_MMAP_THRESHOLD, mmapThreshold) == 1 ? 1 : 0;
}

void sw_malloc_stats(unsigned long long* inuse, unsigned long long* free) {
    struct mallinfo2 mi = mallinfo2();
    // uordblks: bytes in chunks handed out (all arenas); fordblks: free
    // bytes kept in them; hblkhd: large blocks mapped on their own.
    *inuse = mi.uordblks + mi.hblkhd;
    *free = mi.fordblks;
}

int sw_malloc_trim(void) { return malloc_trim(0); }

namespace {

// jpegFail carries libjpeg's error exit back to sw_jpeg_encode: libjpeg's
// default handler would end the process.
struct jpegFail {
    struct jpeg_error_mgr mgr;
    jmp_buf back;
    char msg[JMSG_LENGTH_MAX];
};

void jpegErrorExit(j_common_ptr c) {
    jpegFail* f = reinterpret_cast<jpegFail*>(c->err);
    (*c->err->format_message)(c, f->msg);
    longjmp(f->back, 1);
}

void jpegQuiet(j_common_ptr, int) {}

}  // namespace

int sw_jpeg_encode(void* img, int quality, unsigned char** out, unsigned long* outlen, char* err, int errlen) {
    const cv::Mat* m = static_cast<const cv::Mat*>(img);
    *out = nullptr;
    *outlen = 0;
    if (m->empty() || m->depth() != CV_8U || (m->channels() != 1 && m->channels() != 3)) {
        std::snprintf(err, errlen, "encode jpeg: want an 8-bit grey or BGR image, have type %d", m->type());
        return -1;
    }
    struct jpeg_compress_struct c;
    jpegFail f;
    std::memset(&c, 0, sizeof c);
    c.err = jpeg_std_error(&f.mgr);
    f.mgr.error_exit = jpegErrorExit;
    f.mgr.emit_message = jpegQuiet;
    // Everything setjmp must see after a longjmp lives in c, f, writing
    // and the caller's *out: nothing with a destructor is made below.
    // Once rows are written the memory destination may have replaced (and
    // freed) the buffer *out points to, so it is freed only before that;
    // libjpeg fails there only when it cannot allocate.
    volatile bool writing = false;
    if (setjmp(f.back)) {
        std::snprintf(err, errlen, "encode jpeg: %s", f.msg);
        jpeg_destroy_compress(&c);
        if (!writing && *out != nullptr) free(*out);
        *out = nullptr;
        *outlen = 0;
        return -1;
    }
    jpeg_create_compress(&c);
    jpeg_mem_dest(&c, out, outlen);
    c.image_width = m->cols;
    c.image_height = m->rows;
    c.input_components = m->channels();
    c.in_color_space = m->channels() == 3 ? JCS_EXT_BGR : JCS_GRAYSCALE;
    jpeg_set_defaults(&c);
    jpeg_set_quality(&c, quality, TRUE);
    c.dct_method = JDCT_ISLOW;
    jpeg_start_compress(&c, TRUE);
    writing = true;
    while (c.next_scanline < c.image_height) {
        JSAMPROW row = const_cast<JSAMPROW>(m->ptr<unsigned char>(c.next_scanline));
        jpeg_write_scanlines(&c, &row, 1);
    }
    jpeg_finish_compress(&c);
    jpeg_destroy_compress(&c);
    return 0;
}

void sw_jpeg_free(unsigned char* p) { free(p); }

int sw_area_shrink(void* srcp, int f, void* dstp, char* err, int errlen) {
    try {
        const cv::Mat& src = *static_cast<const cv::Mat*>(srcp);
        cv::Mat& dst = *static_cast<cv::Mat*>(dstp);
        if (src.empty() || src.depth() != CV_8U) {
            std::snprintf(err, errlen, "area shrink: want an 8-bit image, have type %d", src.type());
            return -1;
        }
        // The column sums are 16-bit: f rows of 255 must fit.
        if (f < 1 || f > 256 || src.cols % f != 0 || src.rows % f != 0) {
            std::snprintf(err, errlen, "area shrink: %dx%d is not a whole number of %dx%d blocks", src.cols, src.rows, f, f);
            return -1;
        }
        const int cn = src.channels();
        const int dw = src.cols / f, dh = src.rows / f, n = src.cols * cn;
        dst.create(dh, dw, src.type());
        // On the stack up to a 2 730-pixel-wide BGR row: no allocation per frame.
        cv::AutoBuffer<uint16_t, 8192> col(n);
        // The same expression OpenCV's area resize rounds by (the sum times
        // the single-precision reciprocal of the block's area, rounded to
        // nearest), so that the result is its result bit for bit.
        const float scale = 1.f / (f * f);
        uint16_t* cs = col.data();
        for (int dy = 0; dy < dh; dy++) {
            std::fill(cs, cs + n, 0);
            for (int k = 0; k < f; k++) {
                const uchar* s = src.ptr<uchar>(dy * f + k);
                int i = 0;
#if CV_SIMD
                const int lanes = cv::v_uint8::nlanes, half = cv::v_uint16::nlanes;
                for (; i <= n - lanes; i += lanes) {
                    cv::v_uint16 lo, hi;
                    cv::v_expand(cv::vx_load(s + i), lo, hi);
                    cv::v_store(cs + i, cv::vx_load(cs + i) + lo);
                    cv::v_store(cs + i + half, cv::vx_load(cs + i + half) + hi);
                }
#endif
                for (; i < n; i++) cs[i] += s[i];
            }
            uchar* d = dst.ptr<uchar>(dy);
            for (int dx = 0; dx < dw; dx++) {
                const uint16_t* b = cs + dx * f * cn;
                for (int c = 0; c < cn; c++) {
                    int sum = 0;
                    for (int k = 0; k < f; k++) sum += b[k * cn + c];
                    d[dx * cn + c] = cv::saturate_cast<uchar>(sum * scale);
                }
            }
        }
        return 0;
    } catch (const std::exception& e) {
        copyErr(e, err, errlen);
        return -1;
    }
}
