//! One filter of a target across its nights: the judgement of every frame against the
//! filter's whole record, the weights, each night's row, and the best list. Pure.

use std::collections::BTreeMap;

use super::{
    weight, Best, BestList, Counts, FilterSummary, FrameQuality, NightSummary, Quality, Settings,
    StackFrame, TargetFrame,
};
use crate::measure::stats::median_f64;
use crate::rules::{judge_group_with, FrameFacts, Verdict};

/// Whether a night keeps a frame for the stack.
fn kept(f: &TargetFrame, stack_warned: bool) -> bool {
    f.readable
        && match f.verdict {
            Some(Verdict::Ok) => true,
            Some(Verdict::Warn) => stack_warned,
            _ => false,
        }
}

/// The facts the rules judge a frame by, from its stored metrics (what depends on the
/// night it was taken in, its registration, trails and the Sun, is the night's to judge).
fn facts(f: &TargetFrame) -> FrameFacts {
    match f.quality.as_ref().filter(|_| f.readable) {
        Some(q) => FrameFacts {
            readable: true,
            fwhm_px: q.fwhm_px,
            eccentricity: q.eccentricity,
            background_adu: q.background_adu,
            noise_adu: q.noise_adu,
            star_count: q.star_count,
            fwhm_arcsec: q.fwhm_arcsec,
            snr_median: q.snr_median,
            hfr_px: q.hfr_px,
            limit_mag: q.limit_mag,
            zero_point_mag: q.zero_point_mag,
            ..Default::default()
        },
        None => FrameFacts::default(),
    }
}

/// Medians of frames' quality, and of their weights per second.
fn quality(frames: &[&TargetFrame], weights: &[Option<weight::Weight>]) -> Quality {
    let med = |get: &dyn Fn(&FrameQuality) -> Option<f64>| {
        median_f64(
            &frames
                .iter()
                .filter(|f| f.readable)
                .filter_map(|f| f.quality.as_ref().and_then(get))
                .filter(|v| v.is_finite())
                .collect::<Vec<_>>(),
        )
    };
    Quality {
        fwhm_px: med(&|q| q.fwhm_px),
        fwhm_arcsec: med(&|q| q.fwhm_arcsec),
        eccentricity: med(&|q| q.eccentricity),
        background_adu: med(&|q| q.background_adu),
        limit_mag: med(&|q| q.limit_mag),
        weight_per_s: median_f64(
            &weights
                .iter()
                .flatten()
                .map(|w| w.per_s)
                .collect::<Vec<_>>(),
        ),
    }
}

pub(super) fn filter_summary(
    filter: Option<String>,
    frames: &[&TargetFrame],
    settings: Settings,
) -> FilterSummary {
    let judged = judge_group_with(
        &frames.iter().map(|f| facts(f)).collect::<Vec<_>>(),
        settings.rules,
    );
    let reference_rank = weight::window_start(
        &frames
            .iter()
            .filter_map(|f| f.quality.as_ref().filter(|_| f.readable))
            .filter(|q| q.bright_snr.is_some())
            .map(|q| q.saturated_count)
            .collect::<Vec<_>>(),
    );
    let weights: Vec<Option<weight::Weight>> = frames
        .iter()
        .map(|f| {
            let q = f.quality.as_ref().filter(|_| f.readable)?;
            let snr =
                weight::reference_snr(q.bright_snr.as_deref()?, q.saturated_count, reference_rank)?;
            Some(weight::weight(snr, f.exposure_s))
        })
        .collect();
    let keep: Vec<bool> = frames
        .iter()
        .map(|f| kept(f, settings.stack_warned))
        .collect();
    let kept_rate = median_f64(
        &weights
            .iter()
            .zip(&keep)
            .filter(|(_, k)| **k)
            .filter_map(|(w, _)| w.map(|w| w.per_s))
            .collect::<Vec<_>>(),
    );
    let record = quality(frames, &weights);

    let mut nights: BTreeMap<&str, Vec<usize>> = BTreeMap::new();
    for (i, f) in frames.iter().enumerate() {
        nights.entry(f.night.as_str()).or_default().push(i);
    }
    let per_night: Vec<NightSummary> = nights
        .iter()
        .map(|(night, idx)| {
            let of: Vec<&TargetFrame> = idx.iter().map(|&i| frames[i]).collect();
            let w: Vec<Option<weight::Weight>> = idx.iter().map(|&i| weights[i]).collect();
            night_summary(night, idx, &of, &w, &judged, &keep, record.weight_per_s)
        })
        .collect();

    let mut stack: Vec<StackFrame> = frames
        .iter()
        .enumerate()
        .filter(|(i, _)| keep[*i])
        .map(|(i, f)| StackFrame {
            path: f.path.clone(),
            rig: Some(f.rig.clone()).filter(|r| !r.is_empty()),
            night: f.night.clone(),
            time_unix: f.time_unix,
            exposure_s: f.exposure_s,
            verdict: f.verdict.unwrap_or(Verdict::Ok),
            weight: weights[i].map(|w| w.weight),
            weight_per_s: weights[i].map(|w| w.per_s),
            relative_weight: weights[i]
                .zip(kept_rate)
                .filter(|(_, m)| *m > 0.0)
                .map(|(w, m)| w.per_s / m),
            record_verdict: judged[i].verdict,
            record_reasons: judged[i].reasons.clone(),
            best: false,
        })
        .collect();
    // Best first; frames without a weight last, in time order.
    stack.sort_by(|a, b| {
        b.weight_per_s
            .unwrap_or(f64::NEG_INFINITY)
            .total_cmp(&a.weight_per_s.unwrap_or(f64::NEG_INFINITY))
            .then_with(|| {
                a.time_unix
                    .unwrap_or(f64::NEG_INFINITY)
                    .total_cmp(&b.time_unix.unwrap_or(f64::NEG_INFINITY))
            })
            .then_with(|| a.path.cmp(&b.path))
    });
    let best = choose_best(&mut stack, settings.best);
    let usable_s: f64 = stack
        .iter()
        .map(|s| s.exposure_s.unwrap_or(0.0))
        .fold(0.0, |a, b| a + b);
    let planned_s = settings.plan.and_then(|p| {
        p.hours
            .iter()
            .find(|(f, _)| Some(f) == filter.as_ref())
            .map(|(_, h)| h * 3600.0)
    });
    let mut counts = Counts::default();
    for f in frames {
        counts.add(f.verdict);
    }
    FilterSummary {
        filter,
        nights: per_night.len(),
        frames: counts,
        usable_s,
        planned_s,
        to_go_s: planned_s.map(|p| (p - usable_s).max(0.0)),
        record,
        per_night,
        reference_rank,
        stack,
        best,
    }
}

fn night_summary(
    night: &str,
    idx: &[usize],
    frames: &[&TargetFrame],
    weights: &[Option<weight::Weight>],
    judged: &[crate::rules::Judgement],
    keep: &[bool],
    record_rate: Option<f64>,
) -> NightSummary {
    let mut counts = Counts::default();
    let mut against = Counts::default();
    let mut reasons: BTreeMap<String, usize> = BTreeMap::new();
    let mut usable_s = 0.0;
    for (&i, f) in idx.iter().zip(frames) {
        counts.add(f.verdict);
        against.add(Some(judged[i].verdict));
        for r in &judged[i].reasons {
            *reasons.entry(r.clone()).or_default() += 1;
        }
        if keep[i] {
            usable_s += f.exposure_s.unwrap_or(0.0);
        }
    }
    let q = quality(frames, weights);
    let measured = frames.iter().filter(|f| f.readable).count();
    let notes = reasons
        .iter()
        .filter(|(r, n)| r.as_str() != "unreadable" && **n * 2 > measured)
        .map(|(r, n)| format!("against the target's record: {r} in {n} of {measured} frames"))
        .collect();
    NightSummary {
        night: night.to_string(),
        frames: counts,
        usable_s,
        quality: q,
        relative_weight: q
            .weight_per_s
            .zip(record_rate)
            .filter(|(_, r)| *r > 0.0)
            .map(|(n, r)| n / r),
        against_record: against,
        record_reasons: reasons,
        notes,
    }
}

/// Mark the best of the frames to stack (best first already): every one, the best
/// fraction, or the best up to so many hours; frames the record rejects are left out of
/// a fraction or hours.
fn choose_best(stack: &mut [StackFrame], best: Best) -> BestList {
    let candidates: Vec<usize> = (0..stack.len())
        .filter(|&i| best == Best::All || stack[i].record_verdict != Verdict::Reject)
        .collect();
    let chosen: Vec<usize> = match best {
        Best::All => candidates,
        Best::Fraction(f) => {
            let n = (f.clamp(0.0, 1.0) * candidates.len() as f64).ceil() as usize;
            candidates.into_iter().take(n).collect()
        }
        Best::Hours(h) => {
            let limit = h * 3600.0;
            let mut sum = 0.0;
            let mut out = Vec::new();
            for i in candidates {
                let t = stack[i].exposure_s.unwrap_or(0.0);
                if sum + t > limit + 1e-6 {
                    break;
                }
                sum += t;
                out.push(i);
            }
            out
        }
    };
    let mut list = BestList::default();
    for i in chosen {
        stack[i].best = true;
        list.frames += 1;
        list.exposure_s += stack[i].exposure_s.unwrap_or(0.0);
    }
    list
}
