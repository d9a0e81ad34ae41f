//! Length-delimited framing shared by every socket and recording: each protobuf message is preceded by its
//! length as a protobuf varint (the layout of prost's `encode_length_delimited`). Pure functions over bytes:
//! an incomplete frame is "wait for more" (`Ok(None)`), never an error, and a length prefix over the limit
//! is refused before any of the body is awaited.

use bytes::{Buf, BufMut, BytesMut};
use prost::Message;

use crate::pb::RefusalCode;

/// Largest frame body accepted unless configured otherwise, bytes (the varint prefix not included).
pub const DEFAULT_MAX_FRAME_BYTES: usize = 4 * 1024 * 1024;

/// Longest valid varint: ten bytes carry 64 bits.
pub const MAX_VARINT_LEN: usize = 10;

/// Why bytes could not be framed or unframed.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum FrameError {
    /// The frame body is (or announces itself as) longer than the limit.
    #[error("frame of {size} bytes exceeds the limit of {max} bytes")]
    TooLarge {
        /// Size of the body, announced by the prefix when decoding or measured when encoding, bytes.
        size: u64,
        /// The configured limit, bytes.
        max: usize,
    },
    /// The length prefix is not a varint: more than ten bytes, or a value over 64 bits.
    #[error("length prefix is not a valid varint (over {MAX_VARINT_LEN} bytes or over 64 bits)")]
    BadLengthPrefix,
    /// The body does not decode as the expected message; carries prost's error.
    #[error("frame body does not decode: {0}")]
    Malformed(prost::DecodeError),
    /// The output buffer cannot take the whole frame.
    #[error("output buffer has room for {remaining} bytes, the frame needs {needed}")]
    BufferFull {
        /// Bytes the frame needs, prefix included.
        needed: usize,
        /// Bytes the buffer can still take.
        remaining: usize,
    },
}

impl FrameError {
    /// The refusal code the daemon sends for this error before closing the connection.
    pub fn refusal_code(&self) -> RefusalCode {
        match self {
            Self::TooLarge { .. } => RefusalCode::FrameTooLarge,
            Self::BadLengthPrefix | Self::Malformed(_) | Self::BufferFull { .. } => {
                RefusalCode::MalformedFrame
            }
        }
    }
}

/// Where a frame's body lies, from its decoded length prefix.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FrameHeader {
    /// Bytes taken by the varint prefix.
    pub prefix_len: usize,
    /// Bytes of the body announced by the prefix.
    pub body_len: usize,
}

impl FrameHeader {
    /// Bytes of the whole frame, prefix and body.
    pub fn total_len(&self) -> usize {
        self.prefix_len + self.body_len
    }
}

/// Reads the length prefix at the start of `buf`.
///
/// `Ok(None)` when the prefix itself is not complete yet. A complete prefix announcing more than
/// `max_frame` bytes is [`FrameError::TooLarge`], whether or not the body has arrived.
pub fn frame_header(buf: &[u8], max_frame: usize) -> Result<Option<FrameHeader>, FrameError> {
    let Some((len, prefix_len)) = decode_varint(buf)? else {
        return Ok(None);
    };
    match usize::try_from(len) {
        Ok(body_len) if body_len <= max_frame => Ok(Some(FrameHeader { prefix_len, body_len })),
        _ => Err(FrameError::TooLarge {
            size: len,
            max: max_frame,
        }),
    }
}

/// Decodes one varint from the start of `buf`: `Ok(None)` if it is cut short, else the value and the bytes
/// it took. Accepts non-minimal encodings, as prost does.
fn decode_varint(buf: &[u8]) -> Result<Option<(u64, usize)>, FrameError> {
    let mut value: u64 = 0;
    for (i, &byte) in buf.iter().take(MAX_VARINT_LEN).enumerate() {
        // The tenth byte holds bit 63 only; anything more overflows 64 bits.
        if i == MAX_VARINT_LEN - 1 && byte > 1 {
            return Err(FrameError::BadLengthPrefix);
        }
        value |= u64::from(byte & 0x7f) << (7 * i);
        if byte & 0x80 == 0 {
            return Ok(Some((value, i + 1)));
        }
    }
    if buf.len() >= MAX_VARINT_LEN {
        // Ten bytes, all with the continuation bit set.
        return Err(FrameError::BadLengthPrefix);
    }
    Ok(None)
}

/// Bytes `msg` takes as a frame, prefix included.
pub fn frame_len<M: Message>(msg: &M) -> usize {
    let body = msg.encoded_len();
    prost::length_delimiter_len(body) + body
}

/// Appends `msg` as one frame (varint length, then the body) to `out`.
///
/// Refuses a body longer than `max_frame` ([`FrameError::TooLarge`]) and an `out` without room for the whole
/// frame ([`FrameError::BufferFull`]); in both cases nothing is written.
pub fn encode_frame<M: Message>(msg: &M, max_frame: usize, out: &mut impl BufMut) -> Result<(), FrameError> {
    let body = msg.encoded_len();
    if body > max_frame {
        return Err(FrameError::TooLarge {
            size: body as u64,
            max: max_frame,
        });
    }
    let needed = prost::length_delimiter_len(body) + body;
    let remaining = out.remaining_mut();
    if remaining < needed {
        return Err(FrameError::BufferFull { needed, remaining });
    }
    // Cannot fail: capacity was checked above, and that is prost's only encode error.
    msg.encode_length_delimited(out)
        .map_err(|_| FrameError::BufferFull { needed, remaining })
}

/// Decodes one frame from the start of `buf`.
///
/// `Ok(None)`: the frame is incomplete, wait for more bytes. `Ok(Some((msg, consumed)))`: the message and
/// the bytes it took (prefix and body); bytes after it are left for the next call.
pub fn decode_frame<M: Message + Default>(
    buf: &[u8],
    max_frame: usize,
) -> Result<Option<(M, usize)>, FrameError> {
    let Some(header) = frame_header(buf, max_frame)? else {
        return Ok(None);
    };
    let total = header.total_len();
    let Some(body) = buf.get(header.prefix_len..total) else {
        return Ok(None);
    };
    let msg = M::decode(body).map_err(FrameError::Malformed)?;
    Ok(Some((msg, total)))
}

/// A frame decoder over a growing byte buffer, for a stream codec (the daemon wraps it in a
/// `tokio_util::codec::Decoder`). Holds only the size limit; the buffer belongs to the caller.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FrameDecoder {
    max_frame: usize,
}

impl Default for FrameDecoder {
    fn default() -> Self {
        Self::new(DEFAULT_MAX_FRAME_BYTES)
    }
}

impl FrameDecoder {
    /// A decoder refusing frame bodies longer than `max_frame` bytes.
    pub fn new(max_frame: usize) -> Self {
        Self { max_frame }
    }

    /// The size limit, bytes of body.
    pub fn max_frame(&self) -> usize {
        self.max_frame
    }

    /// Takes one frame off the front of `src`.
    ///
    /// `Ok(None)` leaves `src` untouched (wait for more bytes). A complete frame is split off `src` whether
    /// its body decodes or not, so after [`FrameError::Malformed`] the stream is still in step; after
    /// [`FrameError::TooLarge`] or [`FrameError::BadLengthPrefix`] it is not, and the connection should close.
    pub fn decode_from<M: Message + Default>(&self, src: &mut BytesMut) -> Result<Option<M>, FrameError> {
        let Some(header) = frame_header(src, self.max_frame)? else {
            return Ok(None);
        };
        if src.len() < header.total_len() {
            return Ok(None);
        }
        let mut frame = src.split_to(header.total_len());
        frame.advance(header.prefix_len);
        M::decode(frame.freeze()).map(Some).map_err(FrameError::Malformed)
    }

    /// Total bytes (prefix and body) of the frame at the front of `src`, once its prefix is complete; lets a
    /// codec reserve buffer space for the whole frame in one step.
    pub fn pending_frame_len(&self, src: &[u8]) -> Result<Option<usize>, FrameError> {
        Ok(frame_header(src, self.max_frame)?.map(|h| h.total_len()))
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is the failure report
mod tests {
    use super::*;
    use crate::pb;
    use crate::testdata;

    fn check_round_trip<M: Message + Default + PartialEq + std::fmt::Debug>(msg: &M) {
        let mut buf = Vec::new();
        encode_frame(msg, DEFAULT_MAX_FRAME_BYTES, &mut buf).unwrap();
        // Same bytes as prost's own length-delimited encoding.
        assert_eq!(buf, msg.encode_length_delimited_to_vec());
        assert_eq!(buf.len(), frame_len(msg));
        for split in 0..buf.len() {
            let got: Option<(M, usize)> = decode_frame(&buf[..split], DEFAULT_MAX_FRAME_BYTES).unwrap();
            assert!(got.is_none(), "split at {split} of {} decoded a frame", buf.len());
        }
        let (got, used): (M, usize) = decode_frame(&buf, DEFAULT_MAX_FRAME_BYTES).unwrap().unwrap();
        assert_eq!(&got, msg);
        assert_eq!(used, buf.len());
        // Two frames back to back: the first call consumes exactly the first.
        let mut two = buf.clone();
        two.extend_from_slice(&buf);
        let (_, used): (M, usize) = decode_frame(&two, DEFAULT_MAX_FRAME_BYTES).unwrap().unwrap();
        assert_eq!(used, buf.len());
    }

    #[test]
    fn every_producer_frame_round_trips() {
        for frame in testdata::producer_frames() {
            check_round_trip(&frame);
        }
        check_round_trip(&testdata::hello());
        check_round_trip(&testdata::full_batch(1, 1000, 50));
        check_round_trip(&testdata::status());
        // An empty frame is a zero-length body: one prefix byte.
        check_round_trip(&pb::ProducerFrame::default());
    }

    #[test]
    fn every_reply_and_subscriber_message_round_trips() {
        for reply in testdata::ingest_replies() {
            check_round_trip(&reply);
        }
        for req in testdata::subscriber_requests() {
            check_round_trip(&req);
        }
        for frame in testdata::subscriber_frames() {
            check_round_trip(&frame);
        }
        // The populated alert really is populated: every sub-message present.
        let alert = testdata::full_alert();
        assert!(alert.trigger.is_some() && alert.assessment.is_some() && alert.latency.is_some());
        assert!(alert.assessment.as_ref().unwrap().fit.is_some());
    }

    #[test]
    fn frame_decoder_splits_consumed_bytes() {
        let frames = testdata::producer_frames();
        let mut stream = Vec::new();
        for f in &frames {
            encode_frame(f, DEFAULT_MAX_FRAME_BYTES, &mut stream).unwrap();
        }
        // Feed the stream in 7-byte pieces, as a socket might deliver it.
        let dec = FrameDecoder::default();
        let mut src = BytesMut::new();
        let mut got = Vec::new();
        for chunk in stream.chunks(7) {
            src.extend_from_slice(chunk);
            while let Some(f) = dec.decode_from::<pb::ProducerFrame>(&mut src).unwrap() {
                got.push(f);
            }
        }
        assert_eq!(got, frames);
        assert!(src.is_empty());
    }

    #[test]
    fn pending_frame_len_reports_whole_frame() {
        let frame = testdata::producer_frames().remove(1);
        let mut buf = Vec::new();
        encode_frame(&frame, DEFAULT_MAX_FRAME_BYTES, &mut buf).unwrap();
        let dec = FrameDecoder::new(DEFAULT_MAX_FRAME_BYTES);
        assert_eq!(dec.pending_frame_len(&buf[..3]).unwrap(), Some(buf.len()));
        assert_eq!(dec.pending_frame_len(&buf[..0]).unwrap(), None);
    }

    #[test]
    fn oversize_prefix_is_refused_before_body_arrives() {
        // Prefix announcing 1000 bytes, no body at all.
        let mut buf = Vec::new();
        prost::encode_length_delimiter(1000, &mut buf).unwrap();
        let err = decode_frame::<pb::ProducerFrame>(&buf, 999).unwrap_err();
        assert_eq!(err, FrameError::TooLarge { size: 1000, max: 999 });
        let text = err.to_string();
        assert!(text.contains("999") && text.contains("1000"), "{text}");
        assert_eq!(err.refusal_code(), RefusalCode::FrameTooLarge);
        // At the limit exactly it waits for the body instead.
        assert_eq!(decode_frame::<pb::ProducerFrame>(&buf, 1000).unwrap(), None);
        // A huge 64-bit length is refused too, with the announced size.
        let huge = [0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01];
        let err = decode_frame::<pb::ProducerFrame>(&huge, 4).unwrap_err();
        assert_eq!(
            err,
            FrameError::TooLarge {
                size: u64::MAX,
                max: 4
            }
        );
    }

    #[test]
    fn encode_refuses_oversize_and_full_buffers() {
        let frame = pb::ProducerFrame {
            body: Some(pb::producer_frame::Body::Batch(testdata::full_batch(1, 0, 100))),
        };
        let body = frame.encoded_len();
        let mut out = Vec::new();
        let err = encode_frame(&frame, body - 1, &mut out).unwrap_err();
        assert_eq!(
            err,
            FrameError::TooLarge {
                size: body as u64,
                max: body - 1
            }
        );
        assert!(out.is_empty());
        let mut small = [0u8; 16];
        let err = encode_frame(&frame, body, &mut &mut small[..]).unwrap_err();
        assert_eq!(
            err,
            FrameError::BufferFull {
                needed: frame_len(&frame),
                remaining: 16
            }
        );
    }

    #[test]
    fn malformed_varints_are_errors() {
        // Eleven continuation bytes: never terminates within ten.
        let endless = [0x80u8; 11];
        assert_eq!(
            decode_frame::<pb::ProducerFrame>(&endless, 100),
            Err(FrameError::BadLengthPrefix)
        );
        // Exactly ten continuation bytes is already known bad.
        assert_eq!(
            decode_frame::<pb::ProducerFrame>(&endless[..10], 100),
            Err(FrameError::BadLengthPrefix)
        );
        // Nine is still "wait for more".
        assert_eq!(decode_frame::<pb::ProducerFrame>(&endless[..9], 100), Ok(None));
        // The tenth byte may only carry bit 63.
        let mut overflow = [0xffu8; 10];
        overflow[9] = 0x02;
        assert_eq!(
            decode_frame::<pb::ProducerFrame>(&overflow, 100),
            Err(FrameError::BadLengthPrefix)
        );
        // Non-minimal but valid: 0x85 0x00 is 5.
        assert_eq!(
            frame_header(&[0x85, 0x00], 100).unwrap(),
            Some(FrameHeader {
                prefix_len: 2,
                body_len: 5
            })
        );
    }

    #[test]
    fn undecodable_body_is_malformed_with_prost_text() {
        // Field 1 (hello), wire type 2, announcing 5 bytes inside a 2-byte body.
        let buf = [0x02, 0x0a, 0x05];
        let err = decode_frame::<pb::ProducerFrame>(&buf, 100).unwrap_err();
        let FrameError::Malformed(inner) = &err else {
            panic!("expected Malformed, got {err:?}")
        };
        assert!(err.to_string().contains(&inner.to_string()));
        assert_eq!(err.refusal_code(), RefusalCode::MalformedFrame);
        // The decoder still consumes the malformed frame, keeping the stream in step.
        let mut src = BytesMut::from(&buf[..]);
        src.extend_from_slice(&[0x00]);
        let dec = FrameDecoder::new(100);
        assert!(dec.decode_from::<pb::ProducerFrame>(&mut src).is_err());
        assert_eq!(&src[..], &[0x00]);
        assert_eq!(
            dec.decode_from::<pb::ProducerFrame>(&mut src).unwrap(),
            Some(pb::ProducerFrame::default())
        );
    }
}
