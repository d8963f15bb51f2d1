// C side of package decode: a video stream read with FFmpeg's libraries.
#ifndef STILLWATER_DECODE_H
#define STILLWATER_DECODE_H

#include <stdint.h>

typedef struct SwDecoder SwDecoder;

// Opens url (a file or a network address). opts holds demuxer options as
// "key=value" pairs separated by '\n'; threads is the decoder's thread
// count (1: decode on the caller's thread only); skip_deblock set leaves
// out the codec's in-loop deblocking filter (H.264, HEVC); timeout_us
// bounds the open (0: none). On failure returns NULL and writes why into
// err.
SwDecoder *sw_dec_open(const char *url, const char *opts, int threads, int skip_deblock, int64_t timeout_us, char *err, int errlen);

// Stream facts: frame size, nominal frame rate (0 when unknown), duration
// in seconds (0 when unknown), the frame count the container declares (0
// when it does not), and the codec's name.
void sw_dec_info(SwDecoder *d, int *width, int *height, double *fps, double *duration, int64_t *frames, const char **codec);

// Decodes the next frame. Returns 1 with a frame, 0 at the end of the
// stream, -1 on an error (written into err). timeout_us bounds the call
// (0: none). Packets the decoder rejects are counted, not fatal.
int sw_dec_next(SwDecoder *d, int64_t timeout_us, char *err, int errlen);

// The current frame's presentation time, seconds from the stream's start
// time (NaN when it has none),
// whether it is a key frame, and the decode errors counted so far.
double sw_dec_pts(SwDecoder *d);
int sw_dec_key(SwDecoder *d);
int64_t sw_dec_errors(SwDecoder *d);

// Converts the current frame to packed BGR of dst_w × dst_h into dst (rows
// dst_step bytes apart), scaling by area averaging when smaller. Returns 0,
// or -1 with err written.
int sw_dec_bgr(SwDecoder *d, uint8_t *dst, int dst_w, int dst_h, int dst_step, char *err, int errlen);

// The current frame's 8-bit Y, Cb and Cr planes as the decoder left them:
// the chroma planes are width >> shift_x by height >> shift_y, rounded up;
// full is 1 for the full-range (JPEG) formats. The pointers stay valid
// until the next sw_dec_next. sw_dec_planes returns 1, or 0 when the
// frame is not in such a format (or there is none).
typedef struct {
	const uint8_t *data[3];
	int step[3];
	int width, height;
	int shift_x, shift_y;
	int full;
} SwPlanes;
int sw_dec_planes(SwDecoder *d, SwPlanes *p);

// Packets: the video stream's packets the latest sw_dec_next read, oldest
// first (several when the decoder held frames back, none when it only
// drained). Times are in ticks of 1/SW_TICKS s from the stream's start
// time, SW_NO_TIME when absent; dur is 0 when unknown. data stays valid
// until the next sw_dec_next.
#define SW_TICKS 90000
#define SW_NO_TIME INT64_MIN
int sw_dec_packets(SwDecoder *d);
void sw_dec_packet(SwDecoder *d, int i, const uint8_t **data, int *size, int64_t *pts, int64_t *dts, int64_t *dur, int *key);

// The stream's codec (FFmpeg's AVCodecID), its extradata (valid while d is
// open) and how many frames it may hold back (B-frames).
void sw_dec_params(SwDecoder *d, int *codec_id, const uint8_t **extradata, int *extralen, int *delay);

void sw_dec_close(SwDecoder *d);

// SwMux writes video packets into an MP4 file without decoding them.
typedef struct SwMux SwMux;

// Opens path for a stream of codec_id at width × height with the given
// extradata and B-frame delay; comment (may be NULL) goes into the file's
// comment tag. On failure returns NULL and writes why into err.
SwMux *sw_mux_open(const char *path, int codec_id, int width, int height, const uint8_t *extradata, int extralen, int delay, const char *comment, char *err, int errlen);

// Writes one packet; times in ticks of 1/SW_TICKS s. Returns 0, or -1 with
// err written.
int sw_mux_write(SwMux *m, const uint8_t *data, int size, int64_t pts, int64_t dts, int64_t dur, int key, char *err, int errlen);

// Finishes the file (its index) and frees m. Returns 0, or -1 with err
// written; m is freed either way.
int sw_mux_close(SwMux *m, char *err, int errlen);

#endif
