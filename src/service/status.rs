//! The one place where service errors become gRPC statuses, with the
//! field-level details (`google.rpc.BadRequest`) clients can act on.

use tonic::{Code, Status};
use tonic_types::{ErrorDetails, StatusExt};

use super::Error;
use super::registry;

/// The gRPC status for a request-level error.
pub fn to_status(err: &Error) -> Status {
    let message = err.to_string();
    match err {
        Error::Model(registry::Error::UnknownModel { .. }) => with_violation(
            Code::NotFound,
            message,
            "model",
            "no such model is loaded; see ListModels",
        ),
        Error::Model(registry::Error::NoDefault { .. }) => with_violation(
            Code::NotFound,
            message,
            "model",
            "no default model is loaded; name a model",
        ),
        Error::Model(_) => Status::new(Code::Internal, message),
        Error::BadConfidence { value } => with_violation(
            Code::InvalidArgument,
            message,
            "confidence",
            &format!("{value} is outside [0.5, 0.99] (0 = the model's default)"),
        ),
        Error::TooManyCandidates { count, limit } => {
            let mut details = ErrorDetails::new();
            details.add_bad_request_violation(
                "candidates",
                format!("{count} candidates, at most {limit} (server.max_candidates)"),
            );
            details.add_quota_failure_violation(
                "server.max_candidates",
                format!("at most {limit} candidates per request"),
            );
            Status::with_error_details(Code::ResourceExhausted, message, details)
        }
        Error::MessageTooLarge { size, limit } => {
            let mut details = ErrorDetails::new();
            details.add_quota_failure_violation(
                "server.max_message_bytes",
                format!("message of {size} bytes, at most {limit}"),
            );
            Status::with_error_details(Code::ResourceExhausted, message, details)
        }
        Error::DescriptorNames {
            missing,
            unexpected,
            duplicated,
            ..
        } => {
            let mut details = ErrorDetails::new();
            for n in missing {
                details.add_bad_request_violation("descriptor_names", format!("missing '{n}'"));
            }
            for n in unexpected {
                details.add_bad_request_violation("descriptor_names", format!("unexpected '{n}'"));
            }
            for n in duplicated {
                details.add_bad_request_violation("descriptor_names", format!("'{n}' given twice"));
            }
            Status::with_error_details(Code::InvalidArgument, message, details)
        }
        Error::StreamChanged { field, .. } => with_violation(
            Code::InvalidArgument,
            message.clone(),
            field,
            "must equal the first message's value or be left empty",
        ),
        Error::Audit(_) | Error::ShuttingDown => Status::new(Code::Unavailable, message),
        Error::Internal { .. } => Status::new(Code::Internal, message),
    }
}

impl From<Error> for Status {
    fn from(err: Error) -> Status {
        to_status(&err)
    }
}

fn with_violation(code: Code, message: String, field: &str, description: &str) -> Status {
    Status::with_error_details(
        code,
        message,
        ErrorDetails::with_bad_request_violation(field, description),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_request_error_gets_its_code_and_details() {
        let unknown = Error::Model(registry::Error::UnknownModel {
            requested: "x".into(),
            available: vec!["a".into()],
        });
        let s = to_status(&unknown);
        assert_eq!(s.code(), Code::NotFound);
        assert_eq!(
            s.get_details_bad_request().unwrap().field_violations[0].field,
            "model"
        );

        let s = to_status(&Error::BadConfidence { value: 0.3 });
        assert_eq!(s.code(), Code::InvalidArgument);

        let s = to_status(&Error::TooManyCandidates {
            count: 11,
            limit: 10,
        });
        assert_eq!(s.code(), Code::ResourceExhausted);
        assert!(s.message().contains("server.max_candidates"));

        let s = to_status(&Error::DescriptorNames {
            model: "m".into(),
            expected: 3,
            missing: vec!["logp".into()],
            unexpected: vec!["mw2".into(), "tpsa2".into()],
            duplicated: vec![],
        });
        assert_eq!(s.code(), Code::InvalidArgument);
        assert!(s.message().contains("missing 'logp'"), "{}", s.message());
        let v = s.get_details_bad_request().unwrap().field_violations;
        let d: Vec<&str> = v.iter().map(|f| f.description.as_str()).collect();
        assert_eq!(
            d,
            vec!["missing 'logp'", "unexpected 'mw2'", "unexpected 'tpsa2'"]
        );

        let s = to_status(&Error::Audit(crate::audit::Error::Closed));
        assert_eq!(s.code(), Code::Unavailable);
        let s = to_status(&Error::MessageTooLarge { size: 10, limit: 5 });
        assert_eq!(s.code(), Code::ResourceExhausted);
        assert!(s.message().contains("server.max_message_bytes"));
    }
}
