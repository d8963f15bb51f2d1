#include "shim.h"

#include <cstring>
#include <exception>
#include <string>
#include <vector>

#include <opencv2/core.hpp>
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

}  // namespace

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
