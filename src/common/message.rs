//! The messages a report carries beside its numbers: warnings (something to act on, with what
//! to do) and notes (what Kiln chose and why).
//!
//! Owns: [`Message`], its JSON shape `{code, sentence, remedy?}` and the rule that a warning
//! always has a remedy and a note never has one.
//! Must not: decide what is worth a message (the stages do) or lay messages out (`report`).

use serde::{Deserialize, Serialize};

/// A warning or a note: a short stable code (snake_case, for programs and for searching the
/// documentation), one sentence in plain words, and, for a warning, what to do about it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Message {
    pub code: String,
    pub sentence: String,
    /// What to do about it; present on every warning, absent on every note.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub remedy: Option<String>,
}

impl Message {
    /// Something the user must act on, with what to do.
    pub fn warning(code: &str, sentence: impl Into<String>, remedy: impl Into<String>) -> Message {
        Message {
            code: code.to_string(),
            sentence: sentence.into(),
            remedy: Some(remedy.into()),
        }
    }

    /// What Kiln chose or found, and why; nothing to act on.
    pub fn note(code: &str, sentence: impl Into<String>) -> Message {
        Message {
            code: code.to_string(),
            sentence: sentence.into(),
            remedy: None,
        }
    }

    /// Whether this is a warning (it has a remedy).
    pub fn is_warning(&self) -> bool {
        self.remedy.is_some()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn warnings_carry_a_remedy_and_notes_do_not() {
        let w = Message::warning("rhat_high", "the chains disagree", "run longer");
        let n = Message::note("priors_used", "priors were added");
        assert!(w.is_warning() && !n.is_warning());
        let wj = serde_json::to_value(&w).unwrap();
        let nj = serde_json::to_value(&n).unwrap();
        assert_eq!(wj["remedy"], "run longer");
        assert!(
            nj.get("remedy").is_none(),
            "a note has no remedy field: {nj}"
        );
        assert_eq!(nj["code"], "priors_used");
    }
}
