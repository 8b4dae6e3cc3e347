//! The `[[rules]]` tables, each key of a rule read into its type; a problem names the
//! rule (`rules[N]`, at its header's line) and the key, in words.

use super::{nth_rules_span, number_of, shown_value, Reader};
use crate::config::ConfigProblem;
use crate::rules::{Metric, RuleSpec, Test, Verdict};

/// The keys a rule has, in the order the example lists them.
const KEYS: [&str; 6] = ["reason", "metric", "test", "value", "verdict", "frames"];

/// Every `[[rules]]` table read and checked; a rule with a problem is left out.
pub(super) fn read(r: &mut Reader<'_>) -> Vec<RuleSpec> {
    let tables = r.array_of_tables("rules", "must be [[rules]] tables");
    let mut rules = Vec::new();
    for (k, t) in tables.iter().enumerate() {
        let span = nth_rules_span(r.text, k);
        let messages = match t.as_table() {
            None => vec!["must be a table ([[rules]])".to_string()],
            Some(table) => match rule(r, table, span) {
                Ok(rule) => {
                    let problems = rule.problems();
                    if problems.is_empty() {
                        rules.push(rule);
                    }
                    problems
                }
                Err(problems) => problems,
            },
        };
        for message in messages {
            r.problems.push(ConfigProblem {
                key: format!("rules[{}]", k + 1),
                line: span.map(|(start, _)| start),
                message,
            });
        }
    }
    rules
}

/// One rule's table being read: its problems, in words, each led by its key.
struct RuleReader<'t, 'r, 'a> {
    r: &'r mut Reader<'a>,
    table: &'t toml::Table,
    /// The lines of the rule's header and of the next header.
    span: Option<(usize, usize)>,
    problems: Vec<String>,
}

impl RuleReader<'_, '_, '_> {
    /// `key` read by `convert`; a missing key is a problem when `required`.
    fn get<T>(
        &mut self,
        key: &str,
        expected: &str,
        required: bool,
        convert: impl FnOnce(&toml::Value) -> Option<T>,
    ) -> Option<T> {
        let Some(v) = self.table.get(key) else {
            if required {
                self.problems
                    .push(format!("{key}: missing: give {expected}"));
            }
            return None;
        };
        let read = convert(v);
        if read.is_none() {
            // A number too large for TOML in this rule's lines is shown as written.
            let span = self.span;
            let name = format!("rules.{key}");
            let too_large = self.r.oversized.iter_mut().find(|o| {
                !o.used
                    && o.key.as_deref() == Some(name.as_str())
                    && span.is_some_and(|(a, b)| a < o.line && o.line < b)
            });
            self.problems.push(match too_large {
                Some(o) => {
                    o.used = true;
                    format!("{key}: {} is out of range: give {expected}", o.literal)
                }
                None => format!("{key}: {} is not {expected}", shown_value(v)),
            });
        }
        read
    }
}

/// One rule's keys into a rule, or what is wrong with them.
fn rule(
    r: &mut Reader<'_>,
    table: &toml::Table,
    span: Option<(usize, usize)>,
) -> Result<RuleSpec, Vec<String>> {
    let problems = super::unknown_keys(table, &KEYS, "a rule");
    let mut rr = RuleReader {
        r,
        table,
        span,
        problems,
    };
    let names = |all: Vec<&str>| all.join(", ");
    let metrics = format!(
        "a metric: one of {}",
        names(Metric::ALL.iter().map(|m| m.as_str()).collect())
    );
    let tests = format!(
        "a test: one of {}",
        names(Test::ALL.iter().map(|t| t.as_str()).collect())
    );
    let reason = rr.get(
        "reason",
        "a reason code (text, such as \"soft\")",
        true,
        |v| v.as_str().map(str::to_string),
    );
    let metric = rr.get("metric", &metrics, true, |v| {
        v.as_str().and_then(Metric::from_name)
    });
    let test = rr.get("test", &tests, true, |v| {
        v.as_str().and_then(Test::from_name)
    });
    let value = rr.get("value", "a number", true, number_of);
    // "ok" is read here and refused with the rule's other values (`RuleSpec::problems`).
    let verdict = rr.get("verdict", "\"warn\" or \"reject\"", true, |v| {
        v.as_str().and_then(Verdict::from_name)
    });
    let frames = rr.get("frames", "a whole number of frames", false, |v| {
        v.as_integer().and_then(|n| usize::try_from(n).ok())
    });
    match (reason, metric, test, value, verdict) {
        (Some(reason), Some(metric), Some(test), Some(value), Some(verdict))
            if rr.problems.is_empty() =>
        {
            Ok(RuleSpec {
                reason,
                metric,
                test,
                value,
                verdict,
                frames,
            })
        }
        _ => Err(rr.problems),
    }
}
