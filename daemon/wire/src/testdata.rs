//! Message builders shared by this crate's tests: one value of every message type, with every field set to
//! something other than its default so a field dropped by encoding or decoding shows up as a difference.

use crate::pb;
use crate::pb::{ingest_reply, producer_frame, subscriber_frame, subscriber_request};

pub(crate) fn hello() -> pb::Hello {
    pb::Hello {
        instrument: "ventisca-array".into(),
        token: "s3cret-token".into(),
        schema_version: crate::SCHEMA_VERSION,
        producer: "ventisca-frontend 2.1".into(),
    }
}

/// A valid batch of `n` photons from `t0`, one microsecond apart, with every column present.
pub(crate) fn full_batch(seq: u64, t0: i64, n: usize) -> pb::PhotonBatch {
    let mut b = pb::PhotonBatch {
        seq,
        ..Default::default()
    };
    for i in 0..n {
        let x = i as f64;
        b.time_gps_ns.push(t0 + 1000 * i as i64);
        b.ra_deg.push((17.25 + 7.5 * x) % 360.0);
        b.dec_deg.push(-30.0 + (x * 3.0) % 60.0);
        b.zenith_deg.push((5.0 + x) as f32 % 60.0);
        b.azimuth_deg.push((x * 11.0) as f32 % 360.0);
        b.energy_gev.push(0.1 + 0.5 * x as f32);
        b.psf68_deg.push(0.05 + 0.01 * x as f32);
        b.gammaness.push(((i % 10) as f32) / 10.0);
    }
    b
}

pub(crate) fn status() -> pb::StreamStatus {
    pb::StreamStatus {
        seq: 7,
        now_gps_ns: 1_400_000_000_000_000_000,
        dead: vec![
            pb::DeadInterval {
                start_gps_ns: 10,
                end_gps_ns: 20,
                reason: "calibration run".into(),
            },
            pb::DeadInterval {
                start_gps_ns: 30,
                end_gps_ns: 30,
                reason: "readout stop".into(),
            },
        ],
    }
}

pub(crate) fn producer_frames() -> Vec<pb::ProducerFrame> {
    vec![
        pb::ProducerFrame {
            body: Some(producer_frame::Body::Hello(hello())),
        },
        pb::ProducerFrame {
            body: Some(producer_frame::Body::Batch(full_batch(
                1,
                1_400_000_000_000_000_000,
                40,
            ))),
        },
        pb::ProducerFrame {
            body: Some(producer_frame::Body::Status(status())),
        },
    ]
}

fn welcome() -> pb::Welcome {
    pb::Welcome {
        schema_version: 1,
        server: "glint 0.1.0".into(),
        max_frame_bytes: 4_194_304,
        last_seq: 99,
    }
}

fn refusal() -> pb::Refusal {
    pb::Refusal {
        code: pb::RefusalCode::InvalidBatch as i32,
        detail: "column dec_deg has 9 entries, expected 10 (time_gps_ns)".into(),
        seq: 12,
    }
}

pub(crate) fn ingest_replies() -> Vec<pb::IngestReply> {
    vec![
        pb::IngestReply {
            body: Some(ingest_reply::Body::Welcome(welcome())),
        },
        pb::IngestReply {
            body: Some(ingest_reply::Body::Refusal(refusal())),
        },
        pb::IngestReply {
            body: Some(ingest_reply::Body::Ack(pb::Ack {
                seq: 5,
                photons: 5000,
                refused: 3,
                late: 2,
            })),
        },
    ]
}

pub(crate) fn subscriber_requests() -> Vec<pb::SubscriberRequest> {
    vec![
        pb::SubscriberRequest {
            body: Some(subscriber_request::Body::Subscribe(pb::Subscribe {
                token: "sub-token".into(),
                kinds: vec![pb::AlertKind::Flash as i32, pb::AlertKind::Assessment as i32],
                min_sigma: 4.5,
                resume_after: 17,
                client: "observatory-scheduler".into(),
                schema_version: 1,
                replay_all: true,
            })),
        },
        pb::SubscriberRequest {
            body: Some(subscriber_request::Body::Withdraw(pb::WithdrawRequest {
                token: "op-token".into(),
                alert_id: "GL-ventisca-array-20261201T233112.123-42".into(),
                reason: "known detector artefact".into(),
                operator: "jq".into(),
            })),
        },
    ]
}

/// An alert with every field and sub-message populated.
pub(crate) fn full_alert() -> pb::Alert {
    pb::Alert {
        seq: 42,
        id: "GL-ventisca-array-20261201T233112.123-42".into(),
        kind: pb::AlertKind::Assessment as i32,
        instrument: "ventisca-array".into(),
        issued_utc: "2026-12-01T23:31:42.000000000Z".into(),
        issued_gps_ns: 1_480_289_520_000_000_000,
        trigger: Some(pb::Trigger {
            start_gps_ns: 1_480_289_490_000_000_000,
            end_gps_ns: 1_480_289_491_000_000_000,
            start_utc: "2026-12-01T23:31:12.000000000Z".into(),
            end_utc: "2026-12-01T23:31:13.000000000Z".into(),
            end_mjd: "61375.980011574".into(),
            ra_deg: 83.63,
            dec_deg: 22.01,
            error_radius_deg: 0.3,
            timescale_s: 1.0,
            counts: 9,
            background: 0.4,
            p_value: 1.5e-9,
            sigma: 5.9,
            far_per_year: 0.01,
            search_radius_deg: 0.5,
            photon_time_gps_ns: vec![1, 2, 3],
            photon_ra_deg: vec![83.6, 83.7, 83.5],
            photon_dec_deg: vec![22.0, 22.1, 21.9],
            photon_energy_gev: vec![1.5, 20.0, 300.0],
            zenith_deg: 25.0,
            sigma_post_trials: 2.3,
            sigma_per_seed: 5.9,
            flags: vec!["wide_spread".into()],
            all_sky_sigma: -0.4,
            identical_time_fraction: 0.0,
            spread_sigma: 6.2,
        }),
        assessment: Some(pb::Assessment {
            verdict: pb::Verdict::Isolated as i32,
            post_counts: 2,
            post_background: 1.8,
            post_p_value: 0.5,
            post_sigma: 0.1,
            pre_counts: 1,
            pre_background: 1.7,
            pre_p_value: 0.8,
            pre_sigma: -0.8,
            flags: vec!["dead_time".into()],
            all_sky_counts: 1200,
            all_sky_expected: 1180.5,
            identical_time_fraction: 0.0,
            spread_ratio: 1.1,
            dead_seconds: 2.5,
            fit: Some(pb::EvaporationFit {
                converged: true,
                reason: "ok".into(),
                explosion_gps_ns: 1_480_289_491_100_000_000,
                explosion_utc: "2026-12-01T23:31:13.100000000Z".into(),
                distance_pc: 0.02,
                distance_pc_lo: 0.01,
                distance_pc_hi: 0.04,
                template_p: 0.6,
                gof_test: "cash".into(),
                signal_counts: 8.4,
                background_counts: 0.6,
                ln_likelihood_ratio: 20.5,
                lr_sigma: 6.4,
                burst_preferred: true,
            }),
            flash_seq: 41,
            flash_id: "GL-ventisca-array-20261201T233113.000-41".into(),
            pre_rise: 0.3,
            shape_log_ratio: -4.5,
            shape_template_p: 0.42,
            shape_decay_index: 1.3,
            shape_decay_time_s: 0.75,
            all_sky_sigma: -0.4,
            spread_sigma: 6.2,
        }),
        withdrawn_id: "GL-x-1".into(),
        reason: "test reason".into(),
        latency: Some(pb::Latency {
            received_unix_ns: 100,
            decided_unix_ns: 200,
            journaled_unix_ns: 300,
            sent_unix_ns: 400,
            reorder_hold_ns: 50,
            fsync_wait_ns: 60,
        }),
        replayed: true,
        joint: Some(pb::Joint {
            alert_ids: vec!["GL-a-1".into(), "GL-b-7".into()],
            instruments: vec!["a".into(), "b".into()],
            time_difference_s: 0.25,
            window_s: 1.5,
            light_travel_s: 0.0014,
            separation_deg: 0.1,
            combined_radius_deg: 0.4,
            overlap_sr: 1.7,
            position_chance: 8.9e-5,
            single_far_per_year: vec![0.01, 0.02],
            far_per_year: 1.7e-12,
            has_distance: true,
            distance_pc: 0.03,
            distance_pc_lo: 0.02,
            distance_pc_hi: 0.04,
        }),
    }
}

pub(crate) fn subscriber_frames() -> Vec<pb::SubscriberFrame> {
    vec![
        pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Welcome(welcome())),
        },
        pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Refusal(refusal())),
        },
        pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Alert(full_alert())),
        },
        pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Heartbeat(pb::Heartbeat {
                unix_ns: 1_790_000_000_000_000_000,
                last_seq: 42,
                instruments: vec!["ventisca-array".into(), "lumen-drift".into()],
                watermark_gps_ns: vec![1_480_289_520_000_000_000, 1_480_289_519_000_000_000],
                closing: true,
            })),
        },
    ]
}
