//! Deterministic fuzzing of everything that reads bytes from outside: the frame decoder and the recording
//! reader get random and mutated inputs from a seeded PCG; every case must end in a value or a typed error,
//! never a panic, and what does decode must agree with the well-formed input it came from.

use bytes::BytesMut;
use prost::Message;
use rand::{Rng, RngExt, SeedableRng};
use rand_pcg::Pcg64;

use crate::framing::{
    self, FrameDecoder, FrameError, MAX_VARINT_LEN, decode_frame, encode_frame, frame_header,
};
use crate::pb;
use crate::recording::{Compression, HEADER_LEN, RecordingError, RecordingReader, RecordingWriter};
use crate::testdata;

/// Mutates `bytes` in place with one to four random edits; returns the lowest position touched.
fn mutate(rng: &mut Pcg64, bytes: &mut Vec<u8>) -> usize {
    let mut lowest = bytes.len();
    for _ in 0..rng.random_range(1..=4) {
        let len = bytes.len();
        let pos = if len == 0 { 0 } else { rng.random_range(0..len) };
        match rng.random_range(0..7) {
            0 if len > 0 => bytes[pos] ^= 1 << rng.random_range(0..8),
            1 if len > 0 => bytes[pos] = rng.random(),
            2 => bytes.truncate(pos),
            3 => bytes.insert(pos, rng.random()),
            4 if len > 0 => {
                bytes.remove(pos);
            }
            5 => {
                // A run of continuation bytes: stresses varint parsing.
                let run = rng.random_range(1..=12).min(len - pos);
                bytes[pos..pos + run].fill(0xff);
            }
            _ => {
                // Splice: copy a random slice over another place.
                if len > 1 {
                    let from = rng.random_range(0..len);
                    let n = rng.random_range(1..=(len - from).min(16));
                    let chunk = bytes[from..from + n].to_vec();
                    let end = (pos + n).min(len);
                    bytes[pos..end].copy_from_slice(&chunk[..end - pos]);
                }
            }
        }
        lowest = lowest.min(pos);
    }
    lowest
}

fn random_bytes(rng: &mut Pcg64, max_len: usize) -> Vec<u8> {
    let mut v = vec![0u8; rng.random_range(0..=max_len)];
    rng.fill_bytes(&mut v);
    v
}

/// Feeds `buf` to both decoding entry points and checks they agree and keep their promises.
fn check_decode<M: Message + Default + std::fmt::Debug>(buf: &[u8], max_frame: usize) -> &'static str {
    let result = decode_frame::<M>(buf, max_frame);
    let mut src = BytesMut::from(buf);
    let via_decoder = FrameDecoder::new(max_frame).decode_from::<M>(&mut src);
    match (&result, &via_decoder) {
        (Ok(Some((msg, used))), Ok(Some(msg2))) => {
            let header = frame_header(buf, max_frame).unwrap().unwrap();
            assert_eq!(*used, header.total_len());
            assert!(*used <= buf.len());
            assert_eq!(src.len(), buf.len() - used, "decoder split off exactly the frame");
            // Canonical re-encoding is stable (bytes, not values: a NaN is never equal to itself).
            let once = msg.encode_to_vec();
            assert_eq!(once, msg2.encode_to_vec());
            let mut framed = Vec::new();
            encode_frame(msg, usize::MAX, &mut framed).unwrap();
            let (again, _) = decode_frame::<M>(&framed, usize::MAX).unwrap().unwrap();
            assert_eq!(again.encode_to_vec(), once);
            "ok"
        }
        (Ok(None), Ok(None)) => {
            // Only an incomplete prefix or an incomplete body waits for more.
            match frame_header(buf, max_frame).unwrap() {
                None => assert!(buf.len() < MAX_VARINT_LEN),
                Some(h) => assert!(h.total_len() > buf.len()),
            }
            assert_eq!(src.len(), buf.len(), "waiting leaves the buffer untouched");
            "wait"
        }
        (Err(e), Err(e2)) => {
            assert_eq!(e, e2);
            match e {
                FrameError::TooLarge { size, max } => {
                    assert_eq!(*max, max_frame);
                    assert!(*size > max_frame as u64);
                }
                FrameError::BadLengthPrefix | FrameError::Malformed(_) => {}
                FrameError::BufferFull { .. } => panic!("decoding never reports BufferFull"),
            }
            "err"
        }
        _ => panic!("decode_frame and FrameDecoder disagree: {result:?} vs {via_decoder:?}"),
    }
}

fn valid_frames<M: Message>(msgs: &[M]) -> Vec<Vec<u8>> {
    msgs.iter()
        .map(|m| {
            let mut v = Vec::new();
            encode_frame(m, usize::MAX, &mut v).unwrap();
            v
        })
        .collect()
}

#[test]
fn frame_decoder_survives_random_and_mutated_input() {
    let mut rng = Pcg64::seed_from_u64(0x6c69_6e74);
    let producer = valid_frames(&testdata::producer_frames());
    let subscriber = valid_frames(&testdata::subscriber_requests());
    let mut outcomes = std::collections::BTreeMap::new();
    const CASES: usize = 100_000;
    for case in 0..CASES {
        // Mostly the default limit; sometimes a small one so oversize prefixes are common.
        let max_frame = if rng.random_bool(0.2) {
            rng.random_range(0..300)
        } else {
            framing::DEFAULT_MAX_FRAME_BYTES
        };
        let for_producer = case % 2 == 0;
        let pool = if for_producer { &producer } else { &subscriber };
        let buf = if rng.random_bool(0.25) {
            random_bytes(&mut rng, 64)
        } else {
            let mut b = pool[rng.random_range(0..pool.len())].clone();
            mutate(&mut rng, &mut b);
            b
        };
        let outcome = if for_producer {
            check_decode::<pb::ProducerFrame>(&buf, max_frame)
        } else {
            check_decode::<pb::SubscriberRequest>(&buf, max_frame)
        };
        *outcomes.entry(outcome).or_insert(0usize) += 1;
    }
    // Every path was exercised, not just the error path.
    assert_eq!(outcomes.values().sum::<usize>(), CASES);
    for kind in ["ok", "wait", "err"] {
        assert!(outcomes.get(kind).copied().unwrap_or(0) > 1000, "{outcomes:?}");
    }
}

/// A small recording: hello, three short batches, a status frame.
fn small_recording(compression: Compression) -> (Vec<u8>, Vec<pb::ProducerFrame>, Vec<u64>) {
    use pb::producer_frame::Body;
    let mut frames = vec![testdata::producer_frames().remove(0)];
    for seq in 1..=3 {
        frames.push(pb::ProducerFrame {
            body: Some(Body::Batch(testdata::full_batch(seq, 1_000_000, 3))),
        });
    }
    frames.push(pb::ProducerFrame {
        body: Some(Body::Status(testdata::status())),
    });
    let mut w = RecordingWriter::new(Vec::new(), compression, "mem.glrec").unwrap();
    let mut ends = Vec::new();
    let mut end = HEADER_LEN;
    for f in &frames {
        w.write_frame(f).unwrap();
        end += framing::frame_len(f) as u64;
        ends.push(end);
    }
    (w.finish().unwrap(), frames, ends)
}

#[test]
fn recording_reader_survives_random_and_mutated_input() {
    let mut rng = Pcg64::seed_from_u64(0x0067_6c72_6563);
    let (plain, frames, ends) = small_recording(Compression::None);
    let (packed, _, _) = small_recording(Compression::Zstd(1));
    let mut complete = 0usize;
    let mut errors = 0usize;
    const CASES: usize = 100_000;
    for case in 0..CASES {
        // Mostly plain recordings, where the frames before the first edit must still read back identical;
        // every tenth a compressed one, where the edit scrambles the decompressed stream.
        let compressed = case % 10 == 0;
        let (mut bytes, lowest) = if case % 50 == 1 {
            (random_bytes(&mut rng, 200), 0)
        } else {
            let mut b = if compressed { packed.clone() } else { plain.clone() };
            let lowest = mutate(&mut rng, &mut b);
            (b, lowest)
        };
        if case % 50 == 2 {
            // Random bytes behind a valid header: the frame loop gets raw garbage.
            let mut b = plain[..HEADER_LEN as usize].to_vec();
            b.append(&mut bytes);
            bytes = b;
        }
        let max_frame = if rng.random_bool(0.1) {
            rng.random_range(0..200)
        } else {
            1 << 20
        };
        let reader = match RecordingReader::new(&bytes[..], "fuzz.glrec", max_frame) {
            Ok(r) => r,
            Err(
                RecordingError::NotARecording { .. }
                | RecordingError::UnsupportedVersion { .. }
                | RecordingError::Truncated { .. }
                | RecordingError::Io { .. },
            ) => {
                errors += 1;
                continue;
            }
            Err(e) => panic!("unexpected error opening: {e}"),
        };
        let mut reader = reader;
        let mut read = 0usize;
        loop {
            match reader.next() {
                None => {
                    complete += 1;
                    break;
                }
                Some(Ok(frame)) => {
                    let untouched = case % 50 > 2 && !compressed;
                    if untouched && read < ends.len() && ends[read] <= lowest as u64 {
                        assert_eq!(
                            frame, frames[read],
                            "case {case}: frame {read} before the edit changed"
                        );
                    }
                    read += 1;
                    // A frame takes at least one byte, so the loop is bounded by the input length.
                    assert!(read <= bytes.len());
                }
                Some(Err(e)) => {
                    assert!(
                        matches!(
                            e,
                            RecordingError::Truncated { .. }
                                | RecordingError::Frame { .. }
                                | RecordingError::Io { .. }
                        ),
                        "case {case}: {e}"
                    );
                    assert!(reader.next().is_none(), "an error ends the iteration");
                    errors += 1;
                    break;
                }
            }
        }
    }
    assert_eq!(complete + errors, CASES);
    assert!(
        complete > 1000 && errors > 1000,
        "complete {complete}, errors {errors}"
    );
}
