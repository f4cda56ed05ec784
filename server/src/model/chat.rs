//! A checkpoint's own chat template: a list of role/content messages rendered to the prompt text
//! the model was tuned on, with the generation prompt added.
//!
//! The template is the Jinja text that transformers keeps beside a tokenizer: a
//! `chat_template.jinja` file in the checkpoint folder when there is one, else the
//! `chat_template` entry of `tokenizer_config.json` (a text, or a list of named templates of
//! which the one named `default` is used). It is rendered by minijinja with Python's string and
//! dict methods (`minijinja-contrib`'s pycompat) and the names such templates expect:
//! `messages`, `add_generation_prompt` (always true here), `bos_token`, `eos_token` (from
//! `tokenizer_config.json`) and `raise_exception(message)`. The rendered text is tokenised
//! without adding special tokens, since the template writes them itself (what transformers'
//! `apply_chat_template` does).

use std::path::Path;

use anyhow::Context;
use serde::{Deserialize, Serialize};

/// One message of a conversation.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ChatMessage {
    pub role: String,
    pub content: String,
}

/// A checkpoint's chat template, compiled once at load.
pub struct ChatTemplate {
    env: minijinja::Environment<'static>,
    bos_token: String,
    eos_token: String,
    /// Where the template came from, for logs and errors.
    pub source: String,
}

impl std::fmt::Debug for ChatTemplate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ChatTemplate")
            .field("source", &self.source)
            .finish_non_exhaustive()
    }
}

/// A special token as `tokenizer_config.json` writes it: a text, or an object with `content`.
fn token_text(v: Option<&serde_json::Value>) -> String {
    match v {
        Some(serde_json::Value::String(s)) => s.clone(),
        Some(serde_json::Value::Object(o)) => o
            .get("content")
            .and_then(|c| c.as_str())
            .unwrap_or_default()
            .to_owned(),
        _ => String::new(),
    }
}

impl ChatTemplate {
    /// The template of the checkpoint in `dir`, or `None` when it has none.
    pub fn load(dir: &Path) -> anyhow::Result<Option<Self>> {
        let config_path = dir.join("tokenizer_config.json");
        let config: serde_json::Value = if config_path.exists() {
            let text = std::fs::read_to_string(&config_path)
                .with_context(|| format!("reading {}", config_path.display()))?;
            serde_json::from_str(&text)
                .with_context(|| format!("{} is not JSON", config_path.display()))?
        } else {
            serde_json::Value::Null
        };
        let file = dir.join("chat_template.jinja");
        let (source, text) = if file.exists() {
            let text = std::fs::read_to_string(&file)
                .with_context(|| format!("reading {}", file.display()))?;
            (file.display().to_string(), text)
        } else {
            let source = format!("{} (chat_template)", config_path.display());
            match config.get("chat_template") {
                None | Some(serde_json::Value::Null) => return Ok(None),
                Some(serde_json::Value::String(s)) => (source, s.clone()),
                Some(serde_json::Value::Array(list)) => {
                    let default = list.iter().find(|t| t["name"] == "default");
                    match default.and_then(|t| t["template"].as_str()) {
                        Some(s) => (source, s.to_owned()),
                        None => anyhow::bail!(
                            "{source}: a list of templates without one named \"default\""
                        ),
                    }
                }
                Some(_) => anyhow::bail!("{source}: expected a text or a list of templates"),
            }
        };
        Self::new(
            &text,
            token_text(config.get("bos_token")),
            token_text(config.get("eos_token")),
            source,
        )
        .map(Some)
    }

    /// Compiles `template`; an error names `source` and what is wrong in the template.
    pub fn new(
        template: &str,
        bos_token: String,
        eos_token: String,
        source: String,
    ) -> anyhow::Result<Self> {
        let mut env = minijinja::Environment::new();
        env.set_unknown_method_callback(minijinja_contrib::pycompat::unknown_method_callback);
        env.add_function("raise_exception", |message: String| -> Result<String, _> {
            Err(minijinja::Error::new(
                minijinja::ErrorKind::InvalidOperation,
                message,
            ))
        });
        env.add_template_owned("chat", template.to_owned())
            .map_err(|e| anyhow::anyhow!("{source}: the chat template does not compile: {e}"))?;
        Ok(Self {
            env,
            bos_token,
            eos_token,
            source,
        })
    }

    /// The prompt text for `messages`, ending with the generation prompt. `Err` says what
    /// failed, with the template's own words where it raised an exception (say for a role it
    /// does not take).
    pub fn render(&self, messages: &[ChatMessage]) -> Result<String, String> {
        let template = self
            .env
            .get_template("chat")
            .map_err(|e| format!("the chat template: {e}"))?;
        template
            .render(minijinja::context! {
                messages => messages,
                add_generation_prompt => true,
                bos_token => &self.bos_token,
                eos_token => &self.eos_token,
            })
            .map_err(|e| match e.kind() {
                minijinja::ErrorKind::InvalidOperation => format!(
                    "the chat template refused the messages: {}",
                    e.detail().unwrap_or("")
                ),
                _ => format!("the chat template failed: {e}"),
            })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn msg(role: &str, content: &str) -> ChatMessage {
        ChatMessage {
            role: role.into(),
            content: content.into(),
        }
    }

    #[test]
    fn a_template_renders_messages_with_python_methods_and_refuses_by_its_own_words() {
        let t = ChatTemplate::new(
            "{{ bos_token }}{% for m in messages %}{% if m['role'] not in ['user', 'bot'] %}\
             {{ raise_exception('no role ' + m['role']) }}{% endif %}\
             <{{ m.role.upper() }}>{{ m['content'].strip() }}{% endfor %}\
             {% if add_generation_prompt %}<BOT>{% endif %}",
            "<s>".into(),
            "</s>".into(),
            "test".into(),
        )
        .unwrap();
        assert_eq!(
            t.render(&[msg("user", "  hi "), msg("bot", "yes")])
                .unwrap(),
            "<s><USER>hi<BOT>yes<BOT>"
        );
        assert_eq!(
            t.render(&[msg("system", "x")]).unwrap_err(),
            "the chat template refused the messages: no role system"
        );
    }

    #[test]
    fn a_template_that_does_not_compile_is_refused_naming_its_source() {
        let e = ChatTemplate::new("{% for %}", String::new(), String::new(), "here".into())
            .unwrap_err()
            .to_string();
        assert!(
            e.starts_with("here: the chat template does not compile"),
            "{e}"
        );
    }
}
