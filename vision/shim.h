// Small C interface to the parts of OpenCV that the pinned gocv binding does
// not reach: background subtractors with an explicit learning rate, and a
// capture opened with open-time parameters (timeouts).
#ifndef STILLWATER_SHIM_H
#define STILLWATER_SHIM_H

#ifdef __cplusplus
extern "C" {
#endif

typedef void* SwBackground;
typedef void* SwCapture;

// kind 0 = MOG2 (threshold is varThreshold), 1 = KNN (threshold is dist2Threshold).
SwBackground sw_bg_new(int kind, int history, double threshold, int shadows);
// Returns 0 on success, -1 when OpenCV raised an exception (message in err).
int sw_bg_apply(SwBackground b, void* image, void* fgmask, double learningRate, char* err, int errlen);
int sw_bg_background(SwBackground b, void* dst, char* err, int errlen);
void sw_bg_close(SwBackground b);

// Opens uri with the given backend (0 = any) and open/read timeouts in ms
// (0 = backend default). Returns NULL and fills err when it cannot open.
SwCapture sw_cap_open(const char* uri, int api, int openTimeoutMs, int readTimeoutMs, char* err, int errlen);
// Returns 1 when a frame was read into dst, 0 at end of stream or on a
// failed read, -1 on an OpenCV exception (message in err).
int sw_cap_read(SwCapture c, void* dst, char* err, int errlen);
// sw_cap_grab takes (and decodes) the next frame without converting it;
// sw_cap_retrieve converts the grabbed frame into dst. Both return as
// sw_cap_read does.
int sw_cap_grab(SwCapture c, char* err, int errlen);
int sw_cap_retrieve(SwCapture c, void* dst, char* err, int errlen);
double sw_cap_get(SwCapture c, int prop);
void sw_cap_close(SwCapture c);

// sw_log_forward sends FFmpeg's own log lines (those FFmpeg's level lets
// through; OpenCV sets it to errors) to fd, one per line as "LEVEL text\n",
// instead of stderr. fd should be non-blocking: a line the pipe cannot
// take at once is dropped. fd < 0 puts FFmpeg's default logger back.
// Returns 0, or -1 when libavutil's log functions are not in the process
// (found at run time, so the build needs no FFmpeg headers).
int sw_log_forward(int fd);

#ifdef __cplusplus
}
#endif

#endif
