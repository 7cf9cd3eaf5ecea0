//! How JSON spells the wire's enum values: the value's proto name without
//! its enum's prefix, in lower case (`SEVERITY_WARNING` → `warning`,
//! `ALERT_KIND_END_OF_CHARGE` → `end_of_charge`), the same ids the CLI's
//! JSON and CSV print. `proto/build.rs` puts one of these on every enum
//! field; a value this build does not know is `unknown`.

use serde::Serializer;

/// The id of a proto enum value name, given its enum's prefix.
pub fn id_of(proto_name: &str, prefix: &str) -> String {
    proto_name
        .strip_prefix(prefix)
        .unwrap_or(proto_name)
        .to_ascii_lowercase()
}

macro_rules! serializers {
    ($($name:ident: $ty:ident = $prefix:literal;)*) => {
        $(
            #[doc = concat!("Serializes a `", stringify!($ty), "` field by its id.")]
            pub fn $name<S: Serializer>(code: &i32, s: S) -> Result<S::Ok, S::Error> {
                match super::$ty::try_from(*code) {
                    Ok(v) => s.serialize_str(&id_of(v.as_str_name(), $prefix)),
                    Err(_) => s.serialize_str("unknown"),
                }
            }
        )*
    };
}

serializers! {
    alert_kind: AlertKind = "ALERT_KIND_";
    severity: Severity = "SEVERITY_";
    alert_event_kind: AlertEventKind = "ALERT_EVENT_KIND_";
    current_sign: CurrentSign = "CURRENT_SIGN_";
    reaction_state: ReactionState = "REACTION_STATE_";
    ocv_source: OcvSource = "OCV_SOURCE_";
    ocv_model_basis: OcvModelBasis = "OCV_MODEL_BASIS_";
    bound_breach: BoundBreach = "BOUND_BREACH_";
    operating_mode: OperatingMode = "OPERATING_MODE_";
    segment_kind: SegmentKind = "SEGMENT_KIND_";
    reading_layout: ReadingLayout = "READING_LAYOUT_";
}

/// Serializes a repeated `OcvSource` field as a list of ids.
pub fn ocv_source_list<S: Serializer>(codes: &[i32], s: S) -> Result<S::Ok, S::Error> {
    use serde::ser::SerializeSeq;
    let mut seq = s.serialize_seq(Some(codes.len()))?;
    for code in codes {
        let id = match super::OcvSource::try_from(*code) {
            Ok(v) => id_of(v.as_str_name(), "OCV_SOURCE_"),
            Err(_) => "unknown".to_string(),
        };
        seq.serialize_element(&id)?;
    }
    seq.end()
}

/// The wire value of an id (`warning` → `SEVERITY_WARNING`'s number), for
/// query parameters that name an enum value.
pub fn parse_severity(id: &str) -> Option<i32> {
    super::Severity::from_str_name(&format!("SEVERITY_{}", id.to_ascii_uppercase()))
        .map(|v| v as i32)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pb;

    #[test]
    fn ids_are_the_names_the_cli_prints() {
        let alert = pb::Alert {
            kind: pb::AlertKind::EndOfCharge as i32,
            severity: pb::Severity::Warning as i32,
            ..Default::default()
        };
        let json = serde_json::to_value(&alert).unwrap();
        assert_eq!(json["kind"], "end_of_charge");
        assert_eq!(json["severity"], "warning");
        assert_eq!(json["acknowledged_by"], serde_json::Value::Null);
        let odd = pb::Alert {
            kind: 999,
            ..Default::default()
        };
        assert_eq!(serde_json::to_value(&odd).unwrap()["kind"], "unknown");
    }

    #[test]
    fn severity_ids_parse_back() {
        assert_eq!(
            parse_severity("critical"),
            Some(pb::Severity::Critical as i32)
        );
        assert_eq!(parse_severity("loud"), None);
    }
}
