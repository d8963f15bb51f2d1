// MP4 writing for package decode: a stream's packets copied into a file
// as they came, without decoding (libavformat's MP4 muxer).
#include "decode.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <libavformat/avformat.h>
#include <libavutil/dict.h>
#include <libavutil/error.h>

struct SwMux {
	AVFormatContext *fmt;
	AVPacket *pkt;
	int header; // the header is written: the trailer must be too
};

static void mux_fail(char *err, int errlen, const char *what, int code) {
	char reason[AV_ERROR_MAX_STRING_SIZE] = {0};
	av_strerror(code, reason, sizeof reason);
	snprintf(err, errlen, "%s: %s", what, reason);
}

static void mux_free(SwMux *m) {
	if (!m) {
		return;
	}
	if (m->fmt && m->fmt->pb) {
		avio_closep(&m->fmt->pb);
	}
	avformat_free_context(m->fmt);
	av_packet_free(&m->pkt);
	free(m);
}

SwMux *sw_mux_open(const char *path, int codec_id, int width, int height, const uint8_t *extradata, int extralen, int delay, const char *comment, char *err, int errlen) {
	SwMux *m = calloc(1, sizeof *m);
	int r;
	if (!m || !(m->pkt = av_packet_alloc())) {
		snprintf(err, errlen, "out of memory");
		goto bad;
	}
	if ((r = avformat_alloc_output_context2(&m->fmt, NULL, "mp4", path)) < 0) {
		mux_fail(err, errlen, "mp4 muxer", r);
		goto bad;
	}
	AVStream *st = avformat_new_stream(m->fmt, NULL);
	if (!st) {
		snprintf(err, errlen, "out of memory");
		goto bad;
	}
	AVCodecParameters *par = st->codecpar;
	par->codec_type = AVMEDIA_TYPE_VIDEO;
	par->codec_id = codec_id;
	par->width = width;
	par->height = height;
	par->video_delay = delay;
	if (extralen > 0) {
		par->extradata = av_mallocz(extralen + AV_INPUT_BUFFER_PADDING_SIZE);
		if (!par->extradata) {
			snprintf(err, errlen, "out of memory");
			goto bad;
		}
		memcpy(par->extradata, extradata, extralen);
		par->extradata_size = extralen;
	}
	st->time_base = (AVRational){1, SW_TICKS};
	if (comment && *comment) {
		av_dict_set(&m->fmt->metadata, "comment", comment, 0);
	}
	if ((r = avio_open(&m->fmt->pb, path, AVIO_FLAG_WRITE)) < 0) {
		mux_fail(err, errlen, "create", r);
		goto bad;
	}
	// Fragmented: the index goes with each run of packets from a key
	// frame, flushed to the file as it is cut, so a clip whose writer dies
	// before the end still plays up to its last whole fragment (a plain
	// MP4's index is written only at the end).
	AVDictionary *opts = NULL;
	av_dict_set(&opts, "movflags", "+frag_keyframe+empty_moov+default_base_moof", 0);
	m->fmt->flush_packets = 1;
	r = avformat_write_header(m->fmt, &opts);
	av_dict_free(&opts);
	if (r < 0) {
		mux_fail(err, errlen, "write the header", r);
		goto bad;
	}
	m->header = 1;
	return m;
bad:
	mux_free(m);
	return NULL;
}

int sw_mux_write(SwMux *m, const uint8_t *data, int size, int64_t pts, int64_t dts, int64_t dur, int key, char *err, int errlen) {
	AVPacket *p = m->pkt;
	int r = av_new_packet(p, size);
	if (r < 0) {
		mux_fail(err, errlen, "packet", r);
		return -1;
	}
	memcpy(p->data, data, size);
	p->pts = pts == SW_NO_TIME ? AV_NOPTS_VALUE : pts;
	p->dts = dts == SW_NO_TIME ? AV_NOPTS_VALUE : dts;
	p->duration = dur;
	p->flags = key ? AV_PKT_FLAG_KEY : 0;
	p->stream_index = 0;
	av_packet_rescale_ts(p, (AVRational){1, SW_TICKS}, m->fmt->streams[0]->time_base);
	r = av_write_frame(m->fmt, p); // one stream: nothing to interleave
	av_packet_unref(p);
	if (r < 0) {
		mux_fail(err, errlen, "write a packet", r);
		return -1;
	}
	return 0;
}

int sw_mux_close(SwMux *m, char *err, int errlen) {
	int r = 0;
	if (m->header && (r = av_write_trailer(m->fmt)) < 0) {
		mux_fail(err, errlen, "write the index", r);
	}
	if (r == 0 && m->fmt->pb && (r = avio_closep(&m->fmt->pb)) < 0) {
		mux_fail(err, errlen, "close", r);
	}
	mux_free(m);
	return r < 0 ? -1 : 0;
}
