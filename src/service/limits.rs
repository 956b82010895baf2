//! The message-size limit, enforced on the request body before tonic decodes
//! it, so a caller who sends too much learns which setting to change.
//!
//! tonic has its own decoding limit (also set, as a backstop) but its error
//! cannot name our setting. Every gRPC message is framed as a 1-byte
//! compression flag and a 4-byte big-endian length (gRPC over HTTP/2,
//! "Length-Prefixed-Message"), so reading those five bytes is enough to
//! refuse an oversized message before its bytes are buffered.

use std::pin::Pin;
use std::task::{Context, Poll, ready};

use bytes::Bytes;
use http_body::{Frame, SizeHint};
use tonic::Status;
use tonic::body::Body;

use super::Error;
use super::status::to_status;

/// Wraps a request body so an oversized message fails with a status that
/// names `server.max_message_bytes`.
pub fn limit_request(req: http::Request<Body>, limit: usize) -> http::Request<Body> {
    req.map(|b| Body::new(FrameLimit::new(b, limit)))
}

struct FrameLimit {
    inner: Body,
    limit: usize,
    header: [u8; 5],
    filled: usize,
    remaining: usize,
}

impl FrameLimit {
    fn new(inner: Body, limit: usize) -> FrameLimit {
        FrameLimit {
            inner,
            limit,
            header: [0; 5],
            filled: 0,
            remaining: 0,
        }
    }

    /// Walks the framing across data chunks of any size.
    fn scan(&mut self, mut data: &[u8]) -> Result<(), Status> {
        while !data.is_empty() {
            if self.remaining > 0 {
                let take = self.remaining.min(data.len());
                self.remaining -= take;
                data = &data[take..];
                continue;
            }
            let take = (5 - self.filled).min(data.len());
            self.header[self.filled..self.filled + take].copy_from_slice(&data[..take]);
            self.filled += take;
            data = &data[take..];
            if self.filled == 5 {
                self.filled = 0;
                let len = u32::from_be_bytes([
                    self.header[1],
                    self.header[2],
                    self.header[3],
                    self.header[4],
                ]) as usize;
                if len > self.limit {
                    return Err(to_status(&Error::MessageTooLarge {
                        size: len,
                        limit: self.limit,
                    }));
                }
                self.remaining = len;
            }
        }
        Ok(())
    }
}

impl http_body::Body for FrameLimit {
    type Data = Bytes;
    type Error = Status;

    fn poll_frame(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
    ) -> Poll<Option<Result<Frame<Bytes>, Status>>> {
        let this = &mut *self;
        let frame = ready!(Pin::new(&mut this.inner).poll_frame(cx));
        if let Some(Ok(f)) = &frame
            && let Some(data) = f.data_ref()
            && let Err(status) = this.scan(data)
        {
            return Poll::Ready(Some(Err(status)));
        }
        Poll::Ready(frame)
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> SizeHint {
        self.inner.size_hint()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn frame(len: u32) -> Vec<u8> {
        let mut v = vec![0u8];
        v.extend_from_slice(&len.to_be_bytes());
        v.extend(std::iter::repeat_n(7u8, len as usize));
        v
    }

    #[test]
    fn framing_is_followed_across_arbitrary_chunk_boundaries() {
        let mut stream = Vec::new();
        for len in [0u32, 3, 100, 1, 64] {
            stream.extend(frame(len));
        }
        for chunk in [1usize, 2, 4, 5, 6, 7, 1000] {
            let mut f = FrameLimit::new(Body::empty(), 100);
            for piece in stream.chunks(chunk) {
                f.scan(piece).unwrap();
            }
            assert_eq!((f.filled, f.remaining), (0, 0), "chunk {chunk}");
        }
    }

    /// Reference: headers built with Python's struct.pack('>BI', 0, length)
    /// after the gRPC length-prefixed framing, from
    /// tests/reference/service_ref.py.
    #[test]
    fn headers_built_by_python_are_read_as_their_lengths() {
        let path = concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/fixtures/service_reference.json"
        );
        let text = std::fs::read_to_string(path).expect("run tests/reference/service_ref.py");
        let f: serde_json::Value = serde_json::from_str(&text).expect("fixture JSON");
        for frame in f["grpc_frames"].as_array().expect("frames") {
            let length = frame["length"].as_u64().expect("length") as usize;
            let hex = frame["header"].as_str().expect("header");
            let header: Vec<u8> = (0..hex.len())
                .step_by(2)
                .map(|i| u8::from_str_radix(&hex[i..i + 2], 16).expect("hex"))
                .collect();
            let mut f = FrameLimit::new(Body::empty(), u32::MAX as usize);
            f.scan(&header).expect("within the limit");
            assert_eq!(f.remaining, length);
            if length > 0 {
                let mut f = FrameLimit::new(Body::empty(), length - 1);
                let err = f.scan(&header).expect_err("one byte over");
                assert!(err.message().contains(&format!("{length} bytes")));
            }
        }
    }

    #[test]
    fn an_oversized_frame_is_refused_naming_the_setting() {
        let mut stream = frame(10);
        stream.extend(frame(101));
        for chunk in [1usize, 3, 1000] {
            let mut f = FrameLimit::new(Body::empty(), 100);
            let err = stream
                .chunks(chunk)
                .find_map(|p| f.scan(p).err())
                .expect("refused");
            assert_eq!(err.code(), tonic::Code::ResourceExhausted);
            assert!(err.message().contains("server.max_message_bytes"));
            assert!(err.message().contains("101 bytes"));
        }
    }
}
