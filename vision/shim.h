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

// OpenCV's worker pool for the whole process: n > 0 threads, n < 0 its
// default; sw_get_threads returns the current size.
void sw_set_threads(int n);
int sw_get_threads(void);

// The C allocator (glibc malloc) that OpenCV and FFmpeg use.
// sw_malloc_arenas caps the number of arenas it may create (mallopt
// M_ARENA_MAX) and fixes the size from which blocks are mapped on their
// own (M_MMAP_THRESHOLD, which also stops glibc raising it as large
// blocks are freed); returns 1 on success. sw_malloc_stats fills the bytes in
// use and free inside its heaps (mallinfo2). sw_malloc_trim gives free
// pages of every arena back to the system (malloc_trim); returns 1 when
// some memory was released.
int sw_malloc_arenas(int n, int mmapThreshold);
void sw_malloc_stats(unsigned long long* inuse, unsigned long long* free);
int sw_malloc_trim(void);


// The rectified pool's mean–variance model (see meanvar.go). Every image
// argument is a cv::Mat* of the grid's size: frames CV_8UC3, the short mean,
// the model's mean and variance and the gain CV_32FC3, masks CV_8UC1 (0 or
// 255), score and contrast CV_32FC1.

// sw_pool_accumulate sets shortMean += a (frame − shortMean); a = 1 copies.
int sw_pool_accumulate(void* frame, void* shortMean, double a, char* err, int errlen);

// sw_pool_gain writes to gain, per channel, the local illumination ratio of
// shortMean to mean: sums over square cells of cellPx pixels where weight
// is set, between cell centres bilinear. A cell with fewer than minShare of
// its pixels weighted takes its neighbours' ratio; 1 where none has any.
int sw_pool_gain(void* shortMean, void* mean, void* weight, int cellPx, double minShare, void* gain, char* err, int errlen);

typedef struct {
    double noise2;     // variance floor added to every channel's, grey levels²
    double aMean;      // learning rate of mean and variance where the pixel is background
    double aSlow;      // learning rate where it is foreground but not held
    double learnBelow; // score under which a pixel counts as background
    float varClip;     // a squared residual counts at most varClip times the variance plus noise2
    float varGain;     // the variance learns varGain times as fast as the mean
    int learn;         // 0: score only
    float glintMin;    // a cell sparkling at least this often counts only when darker
} SwPoolParams;

// sw_pool_glint sets rate += a (toggle − rate), where toggle is 1 for a
// pixel of the (unblurred) frame that went from below level in every
// channel to at or above it in one, or back, since the frame before (prev,
// CV_8UC1, which it updates): glitter sparkles, a bright body does not.
int sw_pool_glint(void* frame, void* rate, void* prev, double a, int level, char* err, int errlen);

// sw_pool_update scores img (CV_32FC3 or CV_8UC3) against the model under
// the gain: score = sum over channels of (img − gain·mean)² / (gain²·var +
// noise2), contrast = (sum img − sum gain·mean) / sum gain·mean; both 0
// outside water. With learn set, mean and variance learn img / gain where
// water is set and hold is not.
//
// extra (CV_32FC3, may be empty) is added to the variance when scoring:
// the spread a slight shift of the picture would cause at structure (lane
// lines, walls seen through rippling water). glint (CV_32FC1, may be empty)
// is the glint rate: where it reaches glintMin only a darker cell scores.
int sw_pool_update(void* img, void* mean, void* var, void* gain, void* water, void* hold, void* extra, void* glint,
                   SwPoolParams p, void* score, void* contrast, char* err, int errlen);

// sw_log_forward sends FFmpeg's own log lines (those FFmpeg's level lets
// through; OpenCV sets it to errors) to fd, one per line as "LEVEL text\n",
// instead of stderr. fd should be non-blocking: a line the pipe cannot
// take at once is dropped. fd < 0 puts FFmpeg's default logger back.
// Returns 0, or -1 when libavutil's log functions are not in the process
// (found at run time, so the build needs no FFmpeg headers).
int sw_log_forward(int fd);

// JPEG encoding with libjpeg(-turbo) directly, with the settings OpenCV's
// encoder uses by default (baseline, 4:2:0, the accurate integer DCT), but
// the frame's BGR (or grey) rows handed over as they are rather than
// copied into RGB order first. img is a cv::Mat* of 8-bit pixels, 1 or 3
// channels; quality 1–100. On success returns 0 and sets *out (free it
// with sw_jpeg_free) and *outlen; on failure returns -1 with the message
// in err.
int sw_jpeg_encode(void* img, int quality, unsigned char** out, unsigned long* outlen, char* err, int errlen);
void sw_jpeg_free(unsigned char* p);

// sw_area_shrink averages src (a cv::Mat* of 8-bit pixels, any number of
// channels) over blocks of f × f pixels into dst, giving what OpenCV's
// resize with INTER_AREA gives for a whole factor f, in one pass of 16-bit
// column sums instead of OpenCV's per-pixel gather (two to three times
// faster for factors above 2; OpenCV's own fast path covers only 2). Both sides of src must be multiples of f, and f at
// most 256. Returns 0, or -1 with the message in err.
int sw_area_shrink(void* src, int f, void* dst, char* err, int errlen);

// On a decoded frame's own planes (planes.cpp). sw_plane_grey writes into
// dst (a cv::Mat*) the grey picture of a w × h luma plane averaged down to
// dw × dh: the grey level BGR conversion and then BT.601's grey weights
// would give. sw_yuv_remap remaps the Y plane by mapX, mapY and the
// chroma planes (w >> sx by h >> sy, rounded up) by cmapX, cmapY
// (bilinear, edges replicated) into gy, gcb, gcr, then converts the
// three into dst, CV_8UC3 BGR of the maps' size. full is 1 for full-range
// planes. The maps are OpenCV's fixed-point pair (CV_16SC2, CV_16UC1),
// which sw_fixed_maps makes from float maps (cv::convertMaps): remap
// converts float maps to that pair for every call, the same way. All
// return 0, or -1 with the message in err.
int sw_fixed_maps(void* mapX, void* mapY, void* m1, void* m2, char* err, int errlen);
int sw_plane_grey(const unsigned char* y, int step, int w, int h, int dw, int dh, int full, void* dst, char* err, int errlen);
int sw_yuv_remap(const unsigned char* y, int ystep, const unsigned char* cb, int cbstep, const unsigned char* cr, int crstep,
                 int w, int h, int sx, int sy, int full, void* mapX, void* mapY, void* cmapX, void* cmapY,
                 void* gy, void* gcb, void* gcr, void* dst, char* err, int errlen);

#ifdef __cplusplus
}
#endif

#endif
