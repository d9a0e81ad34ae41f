//! A seeded fuzzing loop over what a peer controls, without sockets: valid producer frames and subscriber
//! requests are mutated (truncated, bit-flipped, given huge varint lengths, NaN and infinite fields, absurd
//! times, strings with control characters) and pushed through the same decode and check functions the
//! listeners call. Nothing may panic, every refusal must carry a known code and a short, escaped detail,
//! and the instrument's watermark must never go back.

use std::time::Instant;

use bytes::BytesMut;
use glint_wire::framing::FrameDecoder;
use glint_wire::pb::{self, producer_frame, subscriber_request};
use prost::Message;

use super::{FrameCheck, Slot, StreamClock, Verdict, authenticate};
use crate::codec::{PRE_AUTH_MAX_FRAME, Refusal};
use crate::config::Secret;
use crate::sinks::subscribers::check_request;

/// Frames pushed through the checks per run.
const ITERATIONS: u64 = 1_000_000;
/// Frame limit after authentication in this test, bytes.
const MAX_FRAME: usize = 64 * 1024;
/// The host clock the checks see, GPS ns (2026-12-05).
const HOST_GPS_NS: i64 = 1_449_000_000_000_000_000;

/// splitmix64: small, seeded, and the same on every machine.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n.max(1)
    }
    fn chance(&mut self, one_in: u64) -> bool {
        self.below(one_in) == 0
    }
}

fn odd_time(r: &mut Rng, base: i64) -> i64 {
    match r.below(8) {
        0 => i64::MAX,
        1 => i64::MIN,
        2 => 0,
        3 => -1,
        4 => base.saturating_add(r.next() as i64 / 4),
        _ => base + r.below(2_000_000_000) as i64 - 1_000_000_000,
    }
}

fn odd_f64(r: &mut Rng, ok: f64) -> f64 {
    match r.below(10) {
        0 => f64::NAN,
        1 => f64::INFINITY,
        2 => f64::NEG_INFINITY,
        3 => -ok,
        4 => f64::MAX,
        5 => f64::MIN_POSITIVE,
        _ => ok,
    }
}

fn odd_text(r: &mut Rng) -> String {
    match r.below(5) {
        0 => "x\n2026-12-05T00:00:00Z  INFO forged line".into(),
        1 => "\u{1b}[31mred\r\0".into(),
        2 => "é".repeat(r.below(3000) as usize),
        3 => String::new(),
        _ => "ventisca-array".into(),
    }
}

fn batch(r: &mut Rng, seq: u64, t0: i64) -> pb::PhotonBatch {
    let n = r.below(48) as usize;
    let mut b = pb::PhotonBatch {
        seq,
        ..Default::default()
    };
    for i in 0..n {
        b.time_gps_ns.push(t0 + i as i64 * 1_000_000);
        b.ra_deg.push(10.0 + i as f64 * 0.1);
        b.dec_deg.push(-20.0);
        b.zenith_deg.push(30.0);
        b.azimuth_deg.push(100.0);
        b.energy_gev.push(50.0);
    }
    if r.chance(3) {
        b.gammaness = vec![0.5; n];
        b.psf68_deg = vec![0.2; n];
    }
    if n > 0 && r.chance(4) {
        b.complete_before_gps_ns = t0;
    }
    // Structural mutations on a valid batch.
    if n > 0 {
        let i = r.below(n as u64) as usize;
        match r.below(12) {
            0 => b.time_gps_ns[i] = odd_time(r, t0),
            1 => b.ra_deg[i] = odd_f64(r, 10.0),
            2 => b.dec_deg[i] = odd_f64(r, -20.0),
            3 => b.zenith_deg[i] = odd_f64(r, 30.0) as f32,
            4 => b.energy_gev[i] = odd_f64(r, 50.0) as f32,
            5 => {
                b.dec_deg.pop();
            }
            6 => b.complete_before_gps_ns = odd_time(r, t0),
            7 => b.time_gps_ns.iter_mut().for_each(|t| *t = odd_time(r, t0)),
            8 => b.seq = r.next(),
            _ => {}
        }
    }
    b
}

fn producer_frame(r: &mut Rng, seq: u64, t0: i64) -> pb::ProducerFrame {
    let body = match r.below(10) {
        0 => producer_frame::Body::Hello(pb::Hello {
            instrument: if r.chance(2) {
                "ventisca-array".into()
            } else {
                odd_text(r)
            },
            token: if r.chance(2) {
                "fuzz-producer-token".into()
            } else {
                odd_text(r)
            },
            schema_version: if r.chance(2) { 1 } else { r.next() as u32 },
            producer: odd_text(r),
        }),
        1 | 2 => producer_frame::Body::Status(pb::StreamStatus {
            seq,
            now_gps_ns: if r.chance(3) { odd_time(r, t0) } else { t0 },
            dead: (0..r.below(3))
                .map(|_| pb::DeadInterval {
                    start_gps_ns: odd_time(r, t0),
                    end_gps_ns: odd_time(r, t0),
                    reason: odd_text(r),
                })
                .collect(),
        }),
        _ => producer_frame::Body::Batch(batch(r, seq, t0)),
    };
    pb::ProducerFrame {
        body: (!r.chance(50)).then_some(body),
    }
}

fn subscriber_request(r: &mut Rng, token: &str) -> pb::SubscriberRequest {
    let body = if r.chance(4) {
        subscriber_request::Body::Withdraw(pb::WithdrawRequest {
            token: if r.chance(2) { token.into() } else { odd_text(r) },
            alert_id: odd_text(r),
            reason: odd_text(r),
            operator: odd_text(r),
        })
    } else {
        let sigma = r.below(10) as f64;
        subscriber_request::Body::Subscribe(pb::Subscribe {
            token: if r.chance(3) { odd_text(r) } else { token.into() },
            kinds: (0..r.below(6))
                .map(|_| {
                    if r.chance(3) {
                        r.next() as i32
                    } else {
                        r.below(7) as i32
                    }
                })
                .collect(),
            min_sigma: odd_f64(r, sigma),
            resume_after: if r.chance(3) { r.next() } else { r.below(5) },
            client: odd_text(r),
            schema_version: if r.chance(3) { r.next() as u32 } else { 1 },
            replay_all: r.chance(2),
        })
    };
    pb::SubscriberRequest {
        body: (!r.chance(50)).then_some(body),
    }
}

/// Mutates encoded frame bytes.
fn mutate_bytes(r: &mut Rng, bytes: &mut Vec<u8>) {
    match r.below(8) {
        0 => {
            let keep = r.below(bytes.len() as u64 + 1) as usize;
            bytes.truncate(keep);
        }
        1 | 2 => {
            for _ in 0..=r.below(4) {
                if !bytes.is_empty() {
                    let i = r.below(bytes.len() as u64) as usize;
                    bytes[i] ^= 1 << r.below(8);
                }
            }
        }
        3 => {
            // A huge (or overlong) length prefix in front of the body.
            let mut huge = Vec::new();
            let len = match r.below(3) {
                0 => u64::MAX,
                1 => 1 << 40,
                _ => PRE_AUTH_MAX_FRAME as u64 + 1,
            };
            prost::encoding::encode_varint(len, &mut huge);
            if r.chance(4) {
                huge = vec![0xff; 11];
            }
            huge.extend_from_slice(bytes);
            *bytes = huge;
        }
        4 => {
            let i = r.below(bytes.len() as u64 + 1) as usize;
            bytes.insert(i, r.next() as u8);
        }
        5 => {
            let n = r.below(64) as usize;
            bytes.extend((0..n).map(|_| r.next() as u8));
        }
        _ => {}
    }
}

fn assert_typed(r: &Refusal) {
    assert_ne!(r.code, pb::RefusalCode::Unspecified, "{r:?}");
    assert!(!r.detail.is_empty(), "{r:?}");
    assert!(
        r.detail.chars().count() <= 600,
        "detail too long: {} chars",
        r.detail.len()
    );
    assert!(
        !r.detail.chars().any(char::is_control),
        "control character in {:?}",
        r.detail
    );
}

#[test]
fn a_million_mutated_frames_never_panic_and_every_refusal_is_typed() {
    let (tx, _rx) = async_channel::bounded(1);
    let slots = vec![Slot::new(
        "ventisca-array".into(),
        Secret::new("fuzz-producer-token"),
        tx,
        20_000_000,
        3_600_000_000_000,
    )];
    let tmp = tempfile::tempdir().expect("tempdir");
    let (cfg, _, sub_token) =
        crate::serve::loopback::loopback_config(tmp.path(), "ventisca-array").expect("config");
    let started = Instant::now();
    let mut r = Rng(0x005e_ed0f_9117);
    let mut check = FrameCheck::new(20_000_000, 3_600_000_000_000, 300_000_000_000);
    let mut clock = StreamClock::default();
    let (mut seq, mut t0) = (1u64, HOST_GPS_NS - 86_400_000_000_000);
    let mut counts = [0u64; 6]; // decode errors, refusals, warnings, takes, subscriber ok, subscriber refused
    for i in 0..ITERATIONS {
        let producer_side = i % 3 != 0;
        let mut bytes = Vec::new();
        if producer_side {
            let f = producer_frame(&mut r, seq, t0);
            f.encode_length_delimited(&mut bytes).expect("vec grows");
        } else {
            subscriber_request(&mut r, &sub_token)
                .encode_length_delimited(&mut bytes)
                .expect("vec grows");
        }
        if r.chance(3) {
            mutate_bytes(&mut r, &mut bytes);
        }
        let limit = if r.chance(2) {
            PRE_AUTH_MAX_FRAME
        } else {
            MAX_FRAME
        };
        let decoder = FrameDecoder::new(limit);
        let mut src = BytesMut::from(&bytes[..]);
        if producer_side {
            let frame = match decoder.decode_from::<pb::ProducerFrame>(&mut src) {
                Err(e) => {
                    assert_ne!(e.refusal_code(), pb::RefusalCode::Unspecified);
                    counts[0] += 1;
                    continue;
                }
                Ok(None) => continue,
                Ok(Some(f)) => f,
            };
            if let Some(producer_frame::Body::Hello(h)) = &frame.body {
                match authenticate(&slots, h) {
                    Ok(s) => assert_eq!(s.id, h.instrument),
                    Err(e) => {
                        assert_typed(&e);
                        counts[1] += 1;
                    }
                }
                continue;
            }
            let before = clock.watermark;
            match check.check(&frame, &mut clock, HOST_GPS_NS) {
                Verdict::Take { late } => {
                    counts[3] += 1;
                    if let Some(producer_frame::Body::Batch(b)) = &frame.body {
                        assert!(late <= b.time_gps_ns.len() as u64);
                    }
                    seq = check.last_seq.saturating_add(1);
                    t0 = clock.latest.unwrap_or(t0).clamp(0, HOST_GPS_NS) + 50_000_000;
                }
                Verdict::Warn(e, photons) => {
                    assert_typed(&e);
                    let n = match &frame.body {
                        Some(producer_frame::Body::Batch(b)) => b.time_gps_ns.len() as u64,
                        _ => 0,
                    };
                    assert_eq!(photons, n, "the refused photons are the frame's");
                    counts[2] += 1;
                    seq = check.last_seq.saturating_add(1);
                }
                Verdict::Close(e) => {
                    assert_typed(&e);
                    counts[1] += 1;
                    // A closed connection: the next frames are a new connection's, as ingest would see them.
                    check = FrameCheck::new(20_000_000, 3_600_000_000_000, 300_000_000_000);
                    seq = 1;
                }
            }
            assert!(
                clock.watermark >= before,
                "watermark went back from {before:?} to {:?}",
                clock.watermark
            );
            if let Some(w) = clock.latest {
                assert!(
                    w <= HOST_GPS_NS + 300_000_000_000,
                    "a time past the host limit was taken: {w}"
                );
            }
        } else {
            let req = match decoder.decode_from::<pb::SubscriberRequest>(&mut src) {
                Err(e) => {
                    assert_ne!(e.refusal_code(), pb::RefusalCode::Unspecified);
                    counts[0] += 1;
                    continue;
                }
                Ok(None) => continue,
                Ok(Some(q)) => q,
            };
            match check_request(req, &cfg.subscribers, 3) {
                Ok(_) => counts[4] += 1,
                Err(e) => {
                    assert_typed(&e);
                    counts[5] += 1;
                }
            }
        }
    }
    println!(
        "{ITERATIONS} frames in {:.1} s: {} undecodable, {} refused and closed, {} warned, {} taken; \
         subscriber requests {} accepted, {} refused",
        started.elapsed().as_secs_f64(),
        counts[0],
        counts[1],
        counts[2],
        counts[3],
        counts[4],
        counts[5]
    );
    // Every path was exercised, not just the decoder's.
    assert!(counts.iter().all(|&c| c > 1000), "{counts:?}");
}
