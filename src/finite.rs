//! Non-finite numbers in JSON: strict JSON has no NaN or infinity, so they are written
//! as `null` and read back as NaN. A leaf: every serialised shape uses these helpers.

use serde::{Deserialize, Deserializer, Serializer};

/// An optional number: `null` when absent or not finite.
pub fn finite<S: Serializer>(v: &Option<f64>, s: S) -> Result<S::Ok, S::Error> {
    match v {
        Some(x) if x.is_finite() => s.serialize_f64(*x),
        _ => s.serialize_none(),
    }
}

/// A number: `null` when not finite.
pub fn finite_num<S: Serializer>(v: &f64, s: S) -> Result<S::Ok, S::Error> {
    finite(&Some(*v), s)
}

/// The way back from [`finite_num`]: `null` is a number that was not finite.
pub fn nan_if_null<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    Option::<f64>::deserialize(d).map(|v| v.unwrap_or(f64::NAN))
}

#[cfg(test)]
mod tests {
    #[derive(serde::Serialize, serde::Deserialize)]
    struct Probe {
        #[serde(
            serialize_with = "super::finite_num",
            deserialize_with = "super::nan_if_null"
        )]
        v: f64,
    }

    #[test]
    fn a_nan_survives_the_round_trip_as_null() {
        let text = serde_json::to_string(&Probe { v: f64::NAN }).unwrap();
        assert_eq!(text, r#"{"v":null}"#);
        let back: Probe = serde_json::from_str(&text).unwrap();
        assert!(back.v.is_nan());
        let back: Probe = serde_json::from_str(r#"{"v":2.5}"#).unwrap();
        assert_eq!(back.v, 2.5);
    }
}
