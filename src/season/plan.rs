//! How far a target's plan is (`[[targets]]`: hours per filter), and how many more
//! nights it takes at a night's usable rate, in one line for the morning summary and
//! the status page. Pure: the usable time of each night and filter in, the line out.

use serde::Serialize;

/// A target's plan: hours of usable exposure wanted per filter.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TargetPlan {
    /// The target as its frames name it (OBJECT, else the folder).
    pub name: String,
    /// (filter, hours), in the order the configuration gives them.
    pub hours: Vec<(String, f64)>,
}

/// One filter's progress.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FilterProgress {
    pub filter: String,
    /// Usable exposure so far (the frames the nights keep), seconds.
    pub done_s: f64,
    pub planned_s: f64,
}

/// A planned target's progress up to and including one night.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlanProgress {
    pub target: String,
    pub night: String,
    pub filters: Vec<FilterProgress>,
    /// Usable exposure of the planned filters on `night`, seconds.
    pub night_usable_s: f64,
    /// What the plan still wants, seconds (a filter past its plan gives none to another).
    pub remaining_s: f64,
    /// Nights like `night` still needed: ⌈remaining / night's usable⌉; `None` when the
    /// plan is complete or the night gave nothing to go by.
    pub nights_left: Option<u64>,
}

/// Usable exposure of one night and filter of a target, seconds.
#[derive(Debug, Clone, PartialEq)]
pub struct NightUsable {
    pub night: String,
    pub filter: Option<String>,
    pub usable_s: f64,
}

/// The plan's progress over the nights up to and including `night` (labels compare as
/// dates: YYYY-MM-DD).
pub fn progress(plan: &TargetPlan, usable: &[NightUsable], night: &str) -> PlanProgress {
    let sum = |filter: &str, only_tonight: bool| -> f64 {
        usable
            .iter()
            .filter(|u| u.filter.as_deref() == Some(filter))
            .filter(|u| {
                if only_tonight {
                    u.night == night
                } else {
                    u.night.as_str() <= night
                }
            })
            .map(|u| u.usable_s)
            // From +0: an empty sum of f64 is -0, which prints as "-0.0".
            .fold(0.0, |a, b| a + b)
    };
    let filters: Vec<FilterProgress> = plan
        .hours
        .iter()
        .map(|(f, h)| FilterProgress {
            filter: f.clone(),
            done_s: sum(f, false),
            planned_s: h * 3600.0,
        })
        .collect();
    let night_usable_s: f64 = plan
        .hours
        .iter()
        .map(|(f, _)| sum(f, true))
        .fold(0.0, |a, b| a + b);
    let remaining_s: f64 = filters
        .iter()
        .map(|f| (f.planned_s - f.done_s).max(0.0))
        .sum();
    let nights_left = (remaining_s > 0.0 && night_usable_s > 0.0)
        .then(|| (remaining_s / night_usable_s).ceil() as u64);
    PlanProgress {
        target: plan.name.clone(),
        night: night.to_string(),
        filters,
        night_usable_s,
        remaining_s,
        nights_left,
    }
}

/// Hours as a plan is written: whole hours without decimals ("10"), else one ("2.5").
fn planned_hours(s: f64) -> String {
    let h = s / 3600.0;
    if (h - h.round()).abs() < 1e-9 {
        format!("{h:.0}")
    } else {
        format!("{h:.1}")
    }
}

impl PlanProgress {
    /// The line in words: "Kestrel Field A: L 8.5 of 10 h, R 1.2 of 3 h; at last night's
    /// usable rate about 2 more nights". `which` names the night whose rate it goes by
    /// ("last night's" in the morning, "tonight's" on the status page).
    pub fn line(&self, which: &str) -> String {
        let filters: Vec<String> = self
            .filters
            .iter()
            .map(|f| {
                format!(
                    "{} {:.1} of {} h",
                    f.filter,
                    f.done_s / 3600.0,
                    planned_hours(f.planned_s)
                )
            })
            .collect();
        let tail = match self.nights_left {
            _ if self.remaining_s <= 0.0 => "the plan is complete".to_string(),
            Some(1) => format!("at {which} usable rate about 1 more night"),
            Some(n) => format!("at {which} usable rate about {n} more nights"),
            None => format!(
                "{} h to go; nothing usable {} to go by",
                planned_hours_to_go(self.remaining_s),
                if which.starts_with("tonight") {
                    "tonight yet"
                } else {
                    "last night"
                }
            ),
        };
        format!("{}: {}; {tail}", self.target, filters.join(", "))
    }
}

fn planned_hours_to_go(s: f64) -> String {
    format!("{:.1}", s / 3600.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn u(night: &str, filter: &str, hours: f64) -> NightUsable {
        NightUsable {
            night: night.into(),
            filter: Some(filter.into()),
            usable_s: hours * 3600.0,
        }
    }

    fn plan() -> TargetPlan {
        TargetPlan {
            name: "Kestrel Field A".into(),
            hours: vec![("L".into(), 10.0), ("R".into(), 3.0)],
        }
    }

    #[test]
    fn the_line_counts_the_nights_so_far_and_the_rate_of_the_last() {
        let usable = [
            u("2026-03-10", "L", 3.0),
            u("2026-03-12", "L", 2.5),
            u("2026-03-14", "L", 3.0),
            u("2026-03-14", "R", 1.2),
            // A later night is not yet counted for the 14th's summary.
            u("2026-03-15", "L", 4.0),
            // Nor is a filter the plan does not name.
            u("2026-03-14", "Ha", 2.0),
        ];
        let p = progress(&plan(), &usable, "2026-03-14");
        assert_eq!(p.filters[0].done_s, 8.5 * 3600.0);
        assert_eq!(p.filters[1].done_s, 1.2 * 3600.0);
        // To go: 1.5 h of L and 1.8 h of R = 3.3 h; last night gave 4.2 h: one night.
        assert!((p.remaining_s - 3.3 * 3600.0).abs() < 1e-6);
        assert_eq!(p.nights_left, Some(1));
        assert_eq!(
            p.line("last night's"),
            "Kestrel Field A: L 8.5 of 10 h, R 1.2 of 3 h; at last night's usable rate about 1 more night"
        );
    }

    #[test]
    fn a_slow_night_a_blank_night_and_a_finished_plan_are_said_as_such() {
        let slow = progress(&plan(), &[u("2026-03-14", "L", 1.0)], "2026-03-14");
        // 9 h of L and 3 h of R to go at 1 h a night.
        assert_eq!(slow.nights_left, Some(12));
        assert!(slow.line("last night's").ends_with("about 12 more nights"));
        let blank = progress(&plan(), &[u("2026-03-12", "L", 1.0)], "2026-03-14");
        assert_eq!(blank.nights_left, None);
        assert_eq!(
            blank.line("last night's"),
            "Kestrel Field A: L 1.0 of 10 h, R 0.0 of 3 h; 12.0 h to go; nothing usable last night to go by"
        );
        let done = progress(
            &plan(),
            &[u("2026-03-14", "L", 11.0), u("2026-03-14", "R", 3.0)],
            "2026-03-14",
        );
        assert_eq!(done.remaining_s, 0.0);
        assert!(done.line("tonight's").ends_with("; the plan is complete"));
        // Plans of a fraction of an hour keep their decimal.
        let half = TargetPlan {
            name: "T".into(),
            hours: vec![("V".into(), 2.5)],
        };
        assert_eq!(
            progress(&half, &[u("2026-03-14", "V", 0.5)], "2026-03-14").line("tonight's"),
            "T: V 0.5 of 2.5 h; at tonight's usable rate about 4 more nights"
        );
    }
}
