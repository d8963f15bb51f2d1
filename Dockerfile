# Build: Debian bookworm with OpenCV 4.6 development files and Go.
FROM golang:1.26-bookworm AS build
RUN apt-get update \
 && DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends libopencv-dev pkg-config g++ \
 && rm -rf /var/lib/apt/lists/*
WORKDIR /src
COPY go.mod go.sum ./
RUN go mod download
COPY . .
RUN CGO_ENABLED=1 go build -trimpath -ldflags="-s -w" -o /out/stillwater ./cmd/stillwater

# Runtime: only the OpenCV runtime libraries gocv links against.
FROM debian:bookworm-slim
RUN apt-get update \
 && DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends \
      libopencv-core406 libopencv-imgproc406 libopencv-imgcodecs406 libopencv-videoio406 \
      libopencv-video406 libopencv-calib3d406 libopencv-features2d406 libopencv-objdetect406 \
      libopencv-dnn406 libopencv-photo406 libopencv-highgui406 libopencv-contrib406 \
      ca-certificates curl \
 && rm -rf /var/lib/apt/lists/* \
 && useradd --system --uid 10001 --home-dir /var/lib/stillwater --create-home stillwater
COPY --from=build /out/stillwater /usr/local/bin/stillwater
USER stillwater
VOLUME /var/lib/stillwater
EXPOSE 9310 4222
HEALTHCHECK --interval=30s --timeout=5s --retries=3 CMD curl -fsS http://127.0.0.1:9310/healthz || exit 1
ENTRYPOINT ["stillwater", "run"]
CMD ["-config", "/etc/stillwater/stillwater.yaml"]
