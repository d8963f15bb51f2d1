// C side of package decode. FFmpeg 5.1's send/receive API: packets are
// read with libavformat, decoded with libavcodec on as many threads as the
// caller asks (one: on the caller's own), and converted with libswscale
// straight from the decoder's planes to the size the caller wants.
#include "decode.h"

#include <math.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <libavcodec/avcodec.h>
#include <libavformat/avformat.h>
#include <libavutil/dict.h>
#include <libavutil/error.h>
#include <libavutil/log.h>
#include <libavutil/pixdesc.h>
#include <libavutil/time.h>
#include <libswscale/swscale.h>

// sws_key is what a conversion context was made for.
struct sws_key {
	int w, h, fmt, dw, dh;
};

struct SwDecoder {
	AVFormatContext *fmt;
	AVCodecContext *ctx;
	AVPacket *pkt;
	AVFrame *frame; // where the decoder writes
	AVFrame *cur;   // the latest frame decoded: kept through a failed read
	struct SwsContext *sws;
	struct sws_key sws_for; // what sws was made for
	int stream;
	int flushing; // the demuxer is done: the decoder is being drained
	int have;     // cur holds a decoded frame
	int fresh;    // the latest sw_dec_next gave cur
	int64_t deadline; // av_gettime_relative() after which I/O is cut off; 0: none
	int64_t errors;
	// The video stream's packets read by the latest sw_dec_next, oldest
	// first, as references (the bytes are not copied).
	AVPacket **kept;
	int nkept, capkept;
};

// keep adds a reference to pkt to the packets of this read.
static int keep(SwDecoder *d, AVPacket *pkt) {
	if (d->nkept == d->capkept) {
		int n = d->capkept ? 2 * d->capkept : 4;
		AVPacket **k = realloc(d->kept, n * sizeof *k);
		if (!k) {
			return AVERROR(ENOMEM);
		}
		for (int i = d->capkept; i < n; i++) {
			k[i] = NULL;
		}
		d->kept = k;
		d->capkept = n;
	}
	if (!d->kept[d->nkept] && !(d->kept[d->nkept] = av_packet_alloc())) {
		return AVERROR(ENOMEM);
	}
	int r = av_packet_ref(d->kept[d->nkept], pkt);
	if (r == 0) {
		d->nkept++;
	}
	return r;
}

static void unkeep(SwDecoder *d) {
	for (int i = 0; i < d->nkept; i++) {
		av_packet_unref(d->kept[i]);
	}
	d->nkept = 0;
}

static int interrupted(void *opaque) {
	const SwDecoder *d = opaque;
	return d->deadline > 0 && av_gettime_relative() > d->deadline;
}

static void set_deadline(SwDecoder *d, int64_t timeout_us) {
	d->deadline = timeout_us > 0 ? av_gettime_relative() + timeout_us : 0;
}

// cause returns AVERROR_EXIT when d's deadline has passed, whatever code
// the demuxer made of being cut off (RTSP says the data was invalid).
static int cause(const SwDecoder *d, int code) { return interrupted((void *)d) ? AVERROR_EXIT : code; }

// fail writes "what: FFmpeg's reason" into err.
static void fail(char *err, int errlen, const char *what, int code) {
	char reason[AV_ERROR_MAX_STRING_SIZE] = {0};
	if (code == AVERROR_EXIT) {
		snprintf(reason, sizeof reason, "timed out");
	} else {
		av_strerror(code, reason, sizeof reason);
	}
	snprintf(err, errlen, "%s: %s", what, reason);
}

// FFmpeg logs process-wide. OpenCV's capture, which opened every camera
// before this package, sets its level to errors on first use; the first
// open here does the same, so warnings such as swscale's note on
// full-range formats stay out of the log, as they did.
static pthread_once_t log_once = PTHREAD_ONCE_INIT;
static void log_errors_only(void) { av_log_set_level(AV_LOG_ERROR); }

SwDecoder *sw_dec_open(const char *url, const char *opts, int threads, int skip_deblock, int64_t timeout_us, char *err, int errlen) {
	pthread_once(&log_once, log_errors_only);
	SwDecoder *d = calloc(1, sizeof *d);
	AVDictionary *dict = NULL;
	int r;
	if (!d) {
		snprintf(err, errlen, "out of memory");
		return NULL;
	}
	d->stream = -1;
	d->fmt = avformat_alloc_context();
	if (!d->fmt) {
		snprintf(err, errlen, "out of memory");
		goto bad;
	}
	d->fmt->interrupt_callback.callback = interrupted;
	d->fmt->interrupt_callback.opaque = d;
	if (opts && *opts && (r = av_dict_parse_string(&dict, opts, "=", "\n", 0)) < 0) {
		fail(err, errlen, "demuxer options", r);
		goto bad;
	}
	set_deadline(d, timeout_us);
	r = avformat_open_input(&d->fmt, url, NULL, &dict);
	av_dict_free(&dict);
	if (r < 0) {
		d->fmt = NULL; // freed by avformat_open_input
		fail(err, errlen, "open", cause(d, r));
		goto bad;
	}
	if ((r = avformat_find_stream_info(d->fmt, NULL)) < 0) {
		fail(err, errlen, "read stream information", cause(d, r));
		goto bad;
	}
	const AVCodec *codec = NULL;
	d->stream = av_find_best_stream(d->fmt, AVMEDIA_TYPE_VIDEO, -1, -1, &codec, 0);
	if (d->stream < 0) {
		fail(err, errlen, "find a video stream", d->stream);
		goto bad;
	}
	d->ctx = avcodec_alloc_context3(codec);
	if (!d->ctx) {
		snprintf(err, errlen, "out of memory");
		goto bad;
	}
	if ((r = avcodec_parameters_to_context(d->ctx, d->fmt->streams[d->stream]->codecpar)) < 0) {
		fail(err, errlen, "codec parameters", r);
		goto bad;
	}
	d->ctx->thread_count = threads > 0 ? threads : 0;
	d->ctx->pkt_timebase = d->fmt->streams[d->stream]->time_base;
	if (skip_deblock) d->ctx->skip_loop_filter = AVDISCARD_ALL;
	if ((r = avcodec_open2(d->ctx, codec, NULL)) < 0) {
		fail(err, errlen, "open the decoder", r);
		goto bad;
	}
	d->pkt = av_packet_alloc();
	d->frame = av_frame_alloc();
	d->cur = av_frame_alloc();
	if (!d->pkt || !d->frame || !d->cur) {
		snprintf(err, errlen, "out of memory");
		goto bad;
	}
	d->deadline = 0;
	return d;
bad:
	sw_dec_close(d);
	return NULL;
}

void sw_dec_info(SwDecoder *d, int *width, int *height, double *fps, double *duration, int64_t *frames, const char **codec) {
	AVStream *st = d->fmt->streams[d->stream];
	*frames = st->nb_frames > 0 ? st->nb_frames : 0;
	AVRational r = av_guess_frame_rate(d->fmt, st, NULL);
	*width = d->ctx->width;
	*height = d->ctx->height;
	*fps = r.num > 0 && r.den > 0 ? av_q2d(r) : 0;
	*duration = d->fmt->duration != AV_NOPTS_VALUE && d->fmt->duration > 0 ? (double)d->fmt->duration / AV_TIME_BASE : 0;
	*codec = d->ctx->codec ? d->ctx->codec->name : "";
}

int sw_dec_next(SwDecoder *d, int64_t timeout_us, char *err, int errlen) {
	int r;
	set_deadline(d, timeout_us);
	d->fresh = 0;
	unkeep(d);
	for (;;) {
		r = avcodec_receive_frame(d->ctx, d->frame);
		if (r == 0) {
			if (d->frame->decode_error_flags || (d->frame->flags & AV_FRAME_FLAG_CORRUPT)) {
				d->errors++;
			}
			av_frame_unref(d->cur);
			av_frame_move_ref(d->cur, d->frame);
			d->have = 1;
			d->fresh = 1;
			d->deadline = 0;
			return 1;
		}
		if (r == AVERROR_EOF) {
			d->deadline = 0;
			return 0;
		}
		if (r != AVERROR(EAGAIN)) {
			fail(err, errlen, "decode", r);
			d->deadline = 0;
			return -1;
		}
		if (d->flushing) { // drained, yet the decoder wants more: nothing left
			d->deadline = 0;
			return 0;
		}
		r = av_read_frame(d->fmt, d->pkt);
		if (r == AVERROR_EOF || (r < 0 && d->fmt->pb && avio_feof(d->fmt->pb) && r != AVERROR_EXIT)) {
			d->flushing = 1;
			avcodec_send_packet(d->ctx, NULL);
			continue;
		}
		if (r < 0) {
			fail(err, errlen, "read", cause(d, r));
			d->deadline = 0;
			return -1;
		}
		if (d->pkt->stream_index == d->stream) {
			if (keep(d, d->pkt) < 0) {
				snprintf(err, errlen, "keep a packet: out of memory");
				av_packet_unref(d->pkt);
				d->deadline = 0;
				return -1;
			}
			r = avcodec_send_packet(d->ctx, d->pkt);
			if (r < 0 && r != AVERROR(EAGAIN)) {
				d->errors++; // damaged data: skip the packet, as a player would
			}
		}
		av_packet_unref(d->pkt);
	}
}

double sw_dec_pts(SwDecoder *d) {
	const AVStream *st = d->fmt->streams[d->stream];
	int64_t t = d->cur->best_effort_timestamp;
	if (!d->fresh || t == AV_NOPTS_VALUE) {
		return NAN;
	}
	if (st->start_time != AV_NOPTS_VALUE) {
		t -= st->start_time;
	}
	return t * av_q2d(st->time_base);
}

int sw_dec_key(SwDecoder *d) { return d->fresh && d->cur->key_frame; }

// ticks rescales t from the stream's time base to 1/90000 s from its
// start time; SW_NO_TIME stays.
static int64_t ticks(const AVStream *st, int64_t t) {
	if (t == AV_NOPTS_VALUE) {
		return SW_NO_TIME;
	}
	if (st->start_time != AV_NOPTS_VALUE) {
		t -= st->start_time;
	}
	return av_rescale_q(t, st->time_base, (AVRational){1, SW_TICKS});
}

int sw_dec_packets(SwDecoder *d) { return d->nkept; }

void sw_dec_packet(SwDecoder *d, int i, const uint8_t **data, int *size, int64_t *pts, int64_t *dts, int64_t *dur, int *key) {
	const AVStream *st = d->fmt->streams[d->stream];
	const AVPacket *p = d->kept[i];
	*data = p->data;
	*size = p->size;
	*pts = ticks(st, p->pts);
	*dts = ticks(st, p->dts);
	*dur = p->duration > 0 ? av_rescale_q(p->duration, st->time_base, (AVRational){1, SW_TICKS}) : 0;
	*key = (p->flags & AV_PKT_FLAG_KEY) != 0;
}

void sw_dec_params(SwDecoder *d, int *codec_id, const uint8_t **extradata, int *extralen, int *delay) {
	const AVCodecParameters *par = d->fmt->streams[d->stream]->codecpar;
	*codec_id = par->codec_id;
	*extradata = par->extradata;
	*extralen = par->extradata ? par->extradata_size : 0;
	*delay = par->video_delay;
}

int64_t sw_dec_errors(SwDecoder *d) { return d->errors; }

// sw_dec_bgr converts the current frame to packed BGR of dst_w × dst_h. At the
// frame's own size it uses the bicubic flag, as OpenCV's FFmpeg capture
// does (no scaling then happens, and the flag only picks swscale's
// converter); smaller, area averaging. The context is made again only
// when the sizes or the frame's format change: swscale's own cache
// (sws_getCachedContext) makes a new one for every frame of a full-range
// (yuvj*) format, which it rewrites to another format internally, and
// logs a warning each time; MJPEG cameras send that format.
int sw_dec_bgr(SwDecoder *d, uint8_t *dst, int dst_w, int dst_h, int dst_step, char *err, int errlen) {
	AVFrame *f = d->cur;
	if (!d->have) {
		snprintf(err, errlen, "no frame decoded");
		return -1;
	}
	if (dst_w <= 0 || dst_h <= 0) {
		snprintf(err, errlen, "output size %dx%d", dst_w, dst_h);
		return -1;
	}
	struct sws_key k = {f->width, f->height, f->format, dst_w, dst_h};
	if (!d->sws || memcmp(&k, &d->sws_for, sizeof k) != 0) {
		int flags = (dst_w == f->width && dst_h == f->height) ? SWS_BICUBIC : SWS_AREA;
		sws_freeContext(d->sws);
		d->sws = sws_getContext(f->width, f->height, f->format, dst_w, dst_h, AV_PIX_FMT_BGR24, flags, NULL, NULL, NULL);
		if (!d->sws) {
			snprintf(err, errlen, "no conversion from %s %dx%d to bgr24 %dx%d", av_get_pix_fmt_name(f->format), f->width, f->height, dst_w, dst_h);
			return -1;
		}
		d->sws_for = k;
	}
	uint8_t *planes[4] = {dst, NULL, NULL, NULL};
	int steps[4] = {dst_step, 0, 0, 0};
	sws_scale(d->sws, (const uint8_t *const *)f->data, f->linesize, 0, f->height, planes, steps);
	return 0;
}

int sw_dec_planes(SwDecoder *d, SwPlanes *p) {
	const AVFrame *f = d->cur;
	if (!d->have) {
		return 0;
	}
	const AVPixFmtDescriptor *desc = av_pix_fmt_desc_get(f->format);
	if (!desc || desc->nb_components != 3 || !(desc->flags & AV_PIX_FMT_FLAG_PLANAR) ||
	    (desc->flags & (AV_PIX_FMT_FLAG_RGB | AV_PIX_FMT_FLAG_PAL | AV_PIX_FMT_FLAG_BE | AV_PIX_FMT_FLAG_ALPHA))) {
		return 0;
	}
	for (int i = 0; i < 3; i++) {
		if (desc->comp[i].plane != i || desc->comp[i].depth != 8 || desc->comp[i].step != 1 || desc->comp[i].shift != 0 || !f->data[i]) {
			return 0;
		}
	}
	p->width = f->width;
	p->height = f->height;
	p->shift_x = desc->log2_chroma_w;
	p->shift_y = desc->log2_chroma_h;
	// swscale, which the BGR conversion uses, counts only the yuvj formats
	// as full range, whatever the frame's colour_range says.
	p->full = f->format == AV_PIX_FMT_YUVJ420P || f->format == AV_PIX_FMT_YUVJ422P ||
	          f->format == AV_PIX_FMT_YUVJ444P || f->format == AV_PIX_FMT_YUVJ440P || f->format == AV_PIX_FMT_YUVJ411P;
	for (int i = 0; i < 3; i++) {
		p->data[i] = f->data[i];
		p->step[i] = f->linesize[i];
	}
	return p->step[0] > 0 && p->step[1] > 0 && p->step[2] > 0;
}

void sw_dec_close(SwDecoder *d) {
	if (!d) {
		return;
	}
	unkeep(d);
	for (int i = 0; i < d->capkept; i++) {
		av_packet_free(&d->kept[i]);
	}
	free(d->kept);
	sws_freeContext(d->sws);
	av_frame_free(&d->frame);
	av_frame_free(&d->cur);
	av_packet_free(&d->pkt);
	avcodec_free_context(&d->ctx);
	avformat_close_input(&d->fmt);
	free(d);
}
