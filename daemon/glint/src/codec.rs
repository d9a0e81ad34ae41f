//! The wire framing of `glint_wire::framing` as a tokio-util codec, shared by every socket the daemon and its
//! clients open (ingest, subscribers, feed, listen, withdraw). Decoding stays the pure function of the wire
//! crate; this only adapts it to `Framed` and keeps the size limit on both directions.

use std::io;
use std::marker::PhantomData;

use bytes::BytesMut;
use glint_wire::framing::{FrameDecoder, FrameError, encode_frame, frame_len};
use glint_wire::pb;
use prost::Message;
use tokio_util::codec::{Decoder, Encoder};

/// Why a framed socket failed.
#[derive(Debug, thiserror::Error)]
pub(crate) enum CodecError {
    /// The socket failed.
    #[error("socket: {0}")]
    Io(#[from] io::Error),
    /// The bytes are not a frame within the limit.
    #[error("{0}")]
    Frame(#[from] FrameError),
}

impl CodecError {
    /// The refusal code to send before closing, when the peer sent something bad (not for I/O errors).
    pub(crate) fn refusal_code(&self) -> Option<pb::RefusalCode> {
        match self {
            Self::Io(_) => None,
            Self::Frame(f) => Some(f.refusal_code()),
        }
    }
}

/// Decodes frames of `In`, encodes frames of `Out`, both limited to `max_frame` bytes of body.
#[derive(Debug)]
pub(crate) struct FrameCodec<In, Out> {
    decoder: FrameDecoder,
    _types: PhantomData<fn(Out) -> In>,
}

impl<In, Out> FrameCodec<In, Out> {
    /// A codec with this frame size limit.
    pub(crate) fn new(max_frame: usize) -> Self {
        Self {
            decoder: FrameDecoder::new(max_frame),
            _types: PhantomData,
        }
    }

    /// Changes the frame size limit (raised from [`PRE_AUTH_MAX_FRAME`] once a peer has authenticated).
    pub(crate) fn set_max_frame(&mut self, max_frame: usize) {
        self.decoder = FrameDecoder::new(max_frame);
    }
}

/// Largest frame accepted before a peer has authenticated (its Hello, Subscribe or WithdrawRequest), bytes:
/// those messages are small, and an unauthenticated peer must not make the daemon hold more than this.
pub(crate) const PRE_AUTH_MAX_FRAME: usize = 4096;

/// Initial read buffer of a connection, bytes; it grows only as bytes arrive.
pub(crate) const INITIAL_READ_BUFFER: usize = 1024;

impl<In: Message + Default, Out> Decoder for FrameCodec<In, Out> {
    type Item = In;
    type Error = CodecError;

    fn decode(&mut self, src: &mut BytesMut) -> Result<Option<In>, CodecError> {
        // Never reserve the length a peer announces: the buffer grows only as bytes arrive (the framed reader
        // doubles it when full), so a peer that announces a large frame and stalls holds what it sent, no
        // more. The prefix is still checked against the limit at once.
        Ok(self.decoder.decode_from(src)?)
    }
}

impl<In, Out: Message> Encoder<Out> for FrameCodec<In, Out> {
    type Error = CodecError;

    fn encode(&mut self, item: Out, dst: &mut BytesMut) -> Result<(), CodecError> {
        dst.reserve(frame_len(&item));
        encode_frame(&item, self.decoder.max_frame(), dst)?;
        Ok(())
    }
}

/// Daemon side of the ingest socket.
pub(crate) type IngestServerCodec = FrameCodec<pb::ProducerFrame, pb::IngestReply>;
/// Producer side of the ingest socket.
pub(crate) type IngestClientCodec = FrameCodec<pb::IngestReply, pb::ProducerFrame>;
/// Daemon side of the subscriber socket.
pub(crate) type SubscriberServerCodec = FrameCodec<pb::SubscriberRequest, pb::SubscriberFrame>;
/// Subscriber (and operator) side of the subscriber socket.
pub(crate) type SubscriberClientCodec = FrameCodec<pb::SubscriberFrame, pb::SubscriberRequest>;

/// A refusal decided by a check: the code and detail the peer gets.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{} (seq {seq}): {detail}", code.as_str_name())]
pub(crate) struct Refusal {
    /// Wire code.
    pub(crate) code: pb::RefusalCode,
    /// What was wrong; peer text in it has been through [`crate::logging::untrusted`].
    pub(crate) detail: String,
    /// The frame's sequence number, 0 when not about one frame.
    pub(crate) seq: u64,
}

impl Refusal {
    pub(crate) fn new(code: pb::RefusalCode, detail: impl Into<String>, seq: u64) -> Self {
        Self {
            code,
            detail: detail.into(),
            seq,
        }
    }
}

/// A refusal reply for a producer.
pub(crate) fn ingest_refusal(code: pb::RefusalCode, detail: impl Into<String>, seq: u64) -> pb::IngestReply {
    pb::IngestReply {
        body: Some(pb::ingest_reply::Body::Refusal(pb::Refusal {
            code: code as i32,
            detail: detail.into(),
            seq,
        })),
    }
}

/// A refusal frame for a subscriber or operator.
pub(crate) fn subscriber_refusal(code: pb::RefusalCode, detail: impl Into<String>) -> pb::SubscriberFrame {
    pb::SubscriberFrame {
        body: Some(pb::subscriber_frame::Body::Refusal(pb::Refusal {
            code: code as i32,
            detail: detail.into(),
            seq: 0,
        })),
    }
}

/// Readable name of a refusal code, e.g. `BAD_TOKEN`.
pub(crate) fn refusal_name(code: i32) -> &'static str {
    pb::RefusalCode::try_from(code).map_or("UNKNOWN_CODE", |c| c.as_str_name())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn codec_round_trips_and_refuses_oversize() {
        let mut client = IngestClientCodec::new(64);
        let mut server = IngestServerCodec::new(64);
        let hello = pb::ProducerFrame {
            body: Some(pb::producer_frame::Body::Hello(pb::Hello {
                instrument: "ventisca-array".into(),
                token: "t".into(),
                schema_version: 1,
                producer: "test".into(),
            })),
        };
        let mut buf = BytesMut::new();
        client.encode(hello.clone(), &mut buf).unwrap();
        // Delivered one byte at a time it only decodes once complete.
        let mut src = BytesMut::new();
        let mut got = None;
        for b in buf.iter() {
            assert!(got.is_none());
            src.extend_from_slice(&[*b]);
            got = server.decode(&mut src).unwrap();
        }
        assert_eq!(got, Some(hello));
        // A prefix announcing more than 64 bytes fails at once, naming the limit.
        let mut big = BytesMut::from(&[0xc8, 0x01][..]);
        let err = server.decode(&mut big).unwrap_err();
        assert_eq!(err.refusal_code(), Some(pb::RefusalCode::FrameTooLarge));
        assert!(err.to_string().contains("64"), "{err}");
        // The encoder keeps the limit too.
        let batch = pb::ProducerFrame {
            body: Some(pb::producer_frame::Body::Batch(pb::PhotonBatch {
                time_gps_ns: vec![1_400_000_000_000_000_000; 40],
                ..Default::default()
            })),
        };
        assert!(client.encode(batch, &mut BytesMut::new()).is_err());
        assert_eq!(refusal_name(pb::RefusalCode::BadToken as i32), "BAD_TOKEN");
    }
}
