//! The `[[targets]]` tables: a target's plan, the hours of usable exposure wanted per
//! filter. A problem names the table (`targets[N]`, at its header's line) and the key.

use super::{header_name, number_of, shown_value, Reader};
use crate::config::ConfigProblem;
use crate::season::plan::TargetPlan;

/// The keys a target has.
const KEYS: [&str; 2] = ["name", "hours"];

/// The line of the `k`-th (0-based) `[[targets]]` header.
fn nth_header(text: &str, k: usize) -> Option<usize> {
    text.lines()
        .enumerate()
        .filter(|(_, l)| l.trim().starts_with("[[") && header_name(l).as_deref() == Some("targets"))
        .nth(k)
        .map(|(i, _)| i + 1)
}

/// Every `[[targets]]` table read and checked; a target with a problem is left out.
pub(super) fn read(r: &mut Reader<'_>) -> Vec<TargetPlan> {
    let tables = r.array_of_tables(
        "targets",
        "must be [[targets]] tables, each with a name and hours per filter",
    );
    let mut plans: Vec<TargetPlan> = Vec::new();
    for (k, t) in tables.iter().enumerate() {
        let line = nth_header(r.text, k);
        let messages = match t.as_table().map(target) {
            None => vec!["must be a table ([[targets]])".to_string()],
            Some(Ok(plan)) => match plans.iter().position(|p| p.name == plan.name) {
                Some(j) => vec![format!(
                    "name: {:?} is planned twice (also targets[{}]); give each target one table",
                    plan.name,
                    j + 1
                )],
                None => {
                    plans.push(plan);
                    Vec::new()
                }
            },
            Some(Err(problems)) => problems,
        };
        for message in messages {
            r.problems.push(ConfigProblem {
                key: format!("targets[{}]", k + 1),
                line,
                message,
            });
        }
    }
    plans
}

/// One target's keys into a plan, or what is wrong with them, in words.
fn target(table: &toml::Table) -> Result<TargetPlan, Vec<String>> {
    let mut problems = super::unknown_keys(table, &KEYS, "a target");
    let name = match table.get("name") {
        None => {
            problems.push("name: missing: give the target as its frames name it (OBJECT, else the folder), such as name = \"Kestrel Field A\"".into());
            None
        }
        Some(v) => match v.as_str().map(str::trim).filter(|s| !s.is_empty()) {
            Some(s) => Some(s.to_string()),
            None => {
                problems.push(format!(
                    "name: {} is not a target's name (text, such as \"Kestrel Field A\")",
                    shown_value(v)
                ));
                None
            }
        },
    };
    let example = "hours per filter, such as hours = { L = 10.0, R = 3.0 }";
    let hours = match table.get("hours") {
        None => {
            problems.push(format!("hours: missing: give {example}"));
            Vec::new()
        }
        Some(v) => match v.as_table() {
            None => {
                problems.push(format!("hours: {} is not {example}", shown_value(v)));
                Vec::new()
            }
            Some(t) if t.is_empty() => {
                problems.push(format!("hours: names no filter: give {example}"));
                Vec::new()
            }
            Some(t) => t
                .iter()
                .filter_map(|(filter, h)| match number_of(h) {
                    Some(x) if x > 0.0 && x.is_finite() => Some((filter.clone(), x)),
                    _ => {
                        problems.push(format!(
                            "hours.{filter}: {} is not a number of hours above 0",
                            shown_value(h)
                        ));
                        None
                    }
                })
                .collect(),
        },
    };
    match name {
        Some(name) if problems.is_empty() => Ok(TargetPlan { name, hours }),
        _ => Err(problems),
    }
}

#[cfg(test)]
mod tests {
    use crate::config::parse;
    use std::path::Path;

    const HEAD: &str = "[watch]\nfolders = [\"/tmp\"]\n";

    #[test]
    fn a_plan_is_read_with_its_hours_per_filter() {
        let text = format!(
            "{HEAD}[[targets]]\nname = \"Kestrel Field A\"\nhours = {{ L = 10.0, R = 3 }}\n\n[[targets]]\nname = \"Kestrel Field C\"\nhours = {{ V = 2.5 }}\n"
        );
        let c = parse(&text, Path::new("/")).unwrap();
        assert_eq!(c.targets.len(), 2);
        assert_eq!(c.targets[0].name, "Kestrel Field A");
        assert_eq!(
            c.targets[0].hours,
            vec![("L".to_string(), 10.0), ("R".to_string(), 3.0)]
        );
        assert_eq!(c.plan_for("Kestrel Field C").unwrap().hours[0].1, 2.5);
        assert!(c.plan_for("Kestrel Field B").is_none());
    }

    #[test]
    fn a_plans_mistakes_are_said_with_the_table_and_its_line() {
        let text = format!(
            "{HEAD}[[targets]]\nname = \"A\"\nhours = {{ L = -1 }}\nhour = 3\n[[targets]]\nhours = \"ten\"\n[[targets]]\nname = \"A\"\nhours = {{ R = 1 }}\n"
        );
        let problems = parse(&text, Path::new("/")).unwrap_err();
        let of = |key: &str| -> Vec<String> {
            problems
                .iter()
                .filter(|p| p.key == key)
                .map(|p| format!("line {:?}: {}", p.line, p.message))
                .collect()
        };
        let first = of("targets[1]");
        assert!(
            first.iter().any(
                |m| m.starts_with("line Some(3): hours.L: -1 is not a number of hours above 0")
            ),
            "{first:?}"
        );
        assert!(
            first
                .iter()
                .any(|m| m.contains("hour: unknown key; did you mean `hours`?")),
            "{first:?}"
        );
        let second = of("targets[2]");
        assert!(
            second
                .iter()
                .any(|m| m.starts_with("line Some(7): name: missing")),
            "{second:?}"
        );
        assert!(
            second
                .iter()
                .any(|m| m.contains("hours: \"ten\" is not hours per filter")),
            "{second:?}"
        );
        // A name given twice, once the first is good: here the first had mistakes, so
        // the third stands alone.
        assert!(of("targets[3]").is_empty(), "{problems:?}");
        let twice = format!(
            "{HEAD}[[targets]]\nname = \"A\"\nhours = {{ L = 1 }}\n[[targets]]\nname = \"A\"\nhours = {{ R = 1 }}\n"
        );
        let problems = parse(&twice, Path::new("/")).unwrap_err();
        assert_eq!(problems.len(), 1, "{problems:?}");
        assert_eq!(problems[0].key, "targets[2]");
        assert_eq!(problems[0].line, Some(6));
        assert!(problems[0]
            .message
            .contains("planned twice (also targets[1])"));
    }
}
