# Build: Debian bookworm with OpenCV 4.6 and FFmpeg 5.1 development files
# (vision/decode links FFmpeg's libraries directly) and Go.
FROM golang:1.26-bookworm AS build
RUN apt-get update \
 && DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends libopencv-dev libjpeg-dev \
      libavformat-dev libavcodec-dev libswscale-dev libavutil-dev pkg-config g++ \
 && rm -rf /var/lib/apt/lists/*
WORKDIR /src
COPY go.mod go.sum ./
RUN go mod download
COPY . .
RUN CGO_ENABLED=1 go build -trimpath -ldflags="-s -w" -o /out/stillwater ./cmd/stillwater
# Record the Debian packages that own the shared libraries the binary links,
# so the runtime stage installs exactly those (usrmerge: try both prefixes).
RUN for f in $(ldd /out/stillwater | awk '/=> \//{print $3}'); do \
      dpkg -S "$f" 2>/dev/null || dpkg -S "/usr$f" 2>/dev/null || dpkg -S "${f#/usr}" 2>/dev/null; \
    done | cut -d: -f1 | sort -u > /out/runtime-packages \
 && grep -q libopencv-core /out/runtime-packages \
 && grep -q libavcodec /out/runtime-packages

# Runtime: only the runtime libraries the binary links (the OpenCV 4.6
# modules: libopencv-core406, -imgproc406, -videoio406, ...; FFmpeg's
# libavformat59, libavcodec59, libswscale6, libavutil57), plus curl for the
# health check.
FROM debian:bookworm-slim
COPY --from=build /out/runtime-packages /tmp/runtime-packages
RUN apt-get update \
 && DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends \
      $(cat /tmp/runtime-packages) ca-certificates curl \
 && rm -rf /var/lib/apt/lists/* /tmp/runtime-packages \
 && useradd --system --uid 10001 --home-dir /var/lib/stillwater --create-home stillwater
COPY --from=build /out/stillwater /usr/local/bin/stillwater
USER stillwater
VOLUME /var/lib/stillwater
EXPOSE 9310 4222
HEALTHCHECK --interval=30s --timeout=5s --retries=3 CMD curl -fsS http://127.0.0.1:9310/healthz || exit 1
ENTRYPOINT ["stillwater", "run"]
CMD ["-config", "/etc/stillwater/stillwater.yaml"]
