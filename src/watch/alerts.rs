//! Live alerts: deciding when something that happened tonight is worth a mail now, with
//! a rate limit so a bad night sends a handful of mails, not hundreds. Pure decisions;
//! the daemon supplies the facts and sends.

use crate::rules::Verdict;

/// Limits from the configuration.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AlertLimits {
    /// Frames stopped arriving for this long (inside the dark window) → alert.
    pub stopped_minutes: f64,
    /// This many rejected frames in a row (same target and filter) → alert.
    pub reject_streak: usize,
    /// Less free space than this on a watched folder's file system → alert.
    pub min_free_gb: f64,
    /// The same kind of alert at most once per this many minutes…
    pub repeat_minutes: f64,
    /// …and at most this many alerts per night in all.
    pub max_per_night: usize,
}

impl Default for AlertLimits {
    fn default() -> Self {
        AlertLimits::from_config(&crate::config::AlertsConfig::default())
    }
}

impl AlertLimits {
    pub fn from_config(c: &crate::config::AlertsConfig) -> Self {
        AlertLimits {
            stopped_minutes: c.stopped_minutes,
            reject_streak: c.reject_streak,
            min_free_gb: c.min_free_gb,
            repeat_minutes: c.repeat_minutes,
            max_per_night: c.max_per_night,
        }
    }
}

/// Whether an alert of one kind may go now, given when that kind last went and how many
/// went tonight.
pub fn allowed(
    limits: &AlertLimits,
    now: f64,
    last_of_kind: Option<f64>,
    sent_tonight: usize,
) -> bool {
    sent_tonight < limits.max_per_night
        && last_of_kind.is_none_or(|t| now - t >= 60.0 * limits.repeat_minutes)
}

/// Frames stopped: the last frame is older than the limit, frames did arrive tonight, and
/// the sky is dark (when the site is known; `dark` None means unknown, taken as dark).
pub fn frames_stopped(
    limits: &AlertLimits,
    now: f64,
    last_frame: Option<f64>,
    dark: Option<bool>,
) -> Option<String> {
    let last = last_frame?;
    let idle = (now - last) / 60.0;
    (idle >= limits.stopped_minutes && dark != Some(false)).then(|| {
        format!("no new frame for {idle:.0} minutes (the capture program or the camera may have stopped)")
    })
}

/// A frame as judged live: its path, verdict and the sentences that say why.
pub type LiveJudgement = (String, Verdict, Vec<String>);

/// A streak of rejections at the end of a group's latest judgements (oldest first): the
/// message names the group, each frame and what was measured in it.
pub fn reject_streak(
    limits: &AlertLimits,
    group: &str,
    latest: &[LiveJudgement],
) -> Option<String> {
    let n = limits.reject_streak.max(1);
    if latest.len() < n
        || latest[latest.len() - n..]
            .iter()
            .any(|j| j.1 != Verdict::Reject)
    {
        return None;
    }
    let frames: Vec<String> = latest[latest.len() - n..]
        .iter()
        .map(|(path, _, why)| {
            let name = std::path::Path::new(path)
                .file_name()
                .map_or(path.clone(), |n| n.to_string_lossy().into_owned());
            if why.is_empty() {
                name
            } else {
                format!("{name} ({})", why.join("; "))
            }
        })
        .collect();
    Some(format!(
        "{group}: the last {n} frames were all rejected: {}",
        frames.join(", ")
    ))
}

/// Low disk space on any of the file systems the daemon uses, each given as a folder on
/// it and its free bytes: one message naming every one that is low.
pub fn low_disk(limits: &AlertLimits, free: &[(String, u64)]) -> Option<String> {
    let low: Vec<String> = free
        .iter()
        .filter(|(_, bytes)| (*bytes as f64 / 1e9) < limits.min_free_gb)
        .map(|(folder, bytes)| format!("only {:.1} GB free where {folder} is", *bytes as f64 / 1e9))
        .collect();
    (!low.is_empty()).then(|| low.join("; "))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rate_limit_and_triggers() {
        let l = AlertLimits::default();
        assert!(allowed(&l, 1000.0, None, 0));
        assert!(!allowed(&l, 1000.0, Some(900.0), 0), "within the hour");
        assert!(allowed(&l, 5000.0, Some(900.0), 0));
        assert!(!allowed(&l, 5000.0, None, 6), "nightly cap");
        assert!(frames_stopped(&l, 10_000.0, Some(10_000.0 - 25.0 * 60.0), Some(true)).is_some());
        assert!(
            frames_stopped(&l, 10_000.0, Some(10_000.0 - 25.0 * 60.0), Some(false)).is_none(),
            "daylight"
        );
        assert!(frames_stopped(&l, 10_000.0, Some(10_000.0 - 5.0 * 60.0), None).is_none());
        let v = |s: &[&str]| {
            s.iter()
                .enumerate()
                .filter_map(|(k, x)| {
                    let why = vec![format!("sky {k}00 ADU is 60 σ above the night's median")];
                    Some((format!("/srv/k{k:03}.fits"), Verdict::from_name(x)?, why))
                })
                .collect::<Vec<_>>()
        };
        let streak = reject_streak(&l, "Field A / L", &v(&["ok", "reject", "reject", "reject"]));
        assert_eq!(
            streak.as_deref(),
            Some("Field A / L: the last 3 frames were all rejected: k001.fits (sky 100 ADU is 60 σ above the night's median), k002.fits (sky 200 ADU is 60 σ above the night's median), k003.fits (sky 300 ADU is 60 σ above the night's median)")
        );
        assert!(reject_streak(&l, "g", &v(&["reject", "ok", "reject", "reject"])).is_none());
        let disks = |a: u64, b: u64| {
            vec![
                ("/srv".to_string(), a),
                ("/var/lib/subwatch".to_string(), b),
            ]
        };
        assert_eq!(
            low_disk(&l, &disks(50_000_000_000, 2_000_000_000)).as_deref(),
            Some("only 2.0 GB free where /var/lib/subwatch is")
        );
        assert!(low_disk(&l, &disks(1_000_000_000, 2_000_000_000))
            .unwrap()
            .contains("/srv is; only 2.0 GB"));
        assert!(low_disk(&l, &disks(50_000_000_000, 50_000_000_000)).is_none());
    }
}
