//! The operators' notes on an event: read from the audit trail (the text
//! of `leak note` and the `--note` of open, revise and close, for the
//! actions carried out) and shown as a panel at the end of the card.
//!
//! Left out: reading the actions from the database (`web`'s, through the
//! request's connection) and writing them (the operator CLI's).

use crate::report::Presentation;
use crate::store::ActionRow;
use crate::web::html::{Html, markup};

/// An operator's note on an event, from the audit trail.
#[derive(Debug, Clone, PartialEq)]
pub struct Note {
    pub at_ms: i64,
    /// open, revise, note or close.
    pub kind: String,
    pub who: String,
    pub text: String,
}

/// The notes in an event's actions: the text of `leak note`, and the
/// `--note` of open, revise and close, for the actions that were carried out.
pub fn notes(actions: &[ActionRow]) -> Vec<Note> {
    actions
        .iter()
        .filter(|a| a.state == "done")
        .filter_map(|a| {
            let text = a
                .request
                .get(if a.kind == "note" { "text" } else { "note" })?
                .as_str()?
                .trim();
            (!text.is_empty()).then(|| Note {
                at_ms: a.handled_at_ms.unwrap_or(a.requested_at_ms),
                kind: a.kind.clone(),
                who: format!("{}@{}", a.os_user, a.host),
                text: text.to_owned(),
            })
        })
        .collect()
}

/// The operators' notes, oldest first; nothing when there are none.
pub(super) fn panel(id: i64, notes: &[Note], people: &Presentation) -> Html {
    if notes.is_empty() {
        return Html::new();
    }
    let mut out = markup!("<div class=\"panel notes\">\n<h3>Operator notes</h3>\n<ol>\n");
    out.extend(notes.iter().map(|n| {
        markup!(
            r#"<li data-field="note" data-event="{id}"><time datetime="{machine}">{at}</time> <span class="who">{who}{doing}</span> {text}</li>
"#,
            id = id,
            machine = crate::report::rfc3339(n.at_ms),
            at = people.time(n.at_ms),
            who = n.who,
            doing = match n.kind.as_str() {
                "open" => ", opening the event:",
                "revise" => ", revising it:",
                "close" => ", closing it:",
                _ => ":",
            },
            text = n.text
        )
    }));
    markup!(&mut out, "</ol>\n</div>\n");
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn notes_come_from_done_actions_of_every_kind() {
        let action = |kind: &str, state: &str, request: serde_json::Value| ActionRow {
            id: 1,
            requested_at_ms: 1_000,
            os_user: "op".into(),
            host: "cr1".into(),
            kind: kind.into(),
            event: Some(1),
            request,
            state: state.into(),
            handled_at_ms: Some(2_000),
            outcome: None,
        };
        let notes = notes(&[
            action(
                "open",
                "done",
                serde_json::json!({"note": "seen by the dike wall"}),
            ),
            action(
                "note",
                "done",
                serde_json::json!({"text": "foam on its way"}),
            ),
            action(
                "note",
                "refused",
                serde_json::json!({"text": "never applied"}),
            ),
            action("close", "done", serde_json::json!({"note": null})),
        ]);
        let texts: Vec<&str> = notes.iter().map(|n| n.text.as_str()).collect();
        assert_eq!(texts, ["seen by the dike wall", "foam on its way"]);
        assert_eq!(notes[0].who, "op@cr1");
    }
}
