//! Command templates: argument lists with `{{namespace:name}}` and `{{name}}` placeholders.
//!
//! A stage's `run` list is parsed once into a [`Template`]. Parsing checks only the syntax;
//! [`Template::placeholders`] lets the campaign validator report undefined names before
//! anything runs. Rendering has two modes:
//!
//! - [`Template::render`]: each template argument becomes exactly one argument of the
//!   program. Substituted values are inserted verbatim and never re-parsed, so a value like
//!   `x; touch /tmp/pwned` reaches the program as that one literal argument.
//! - [`Template::render_shell`]: for stages that opt into a shell. The template is the
//!   script for `/bin/sh -c` (a campaign's shell stage gives it as one string; several
//!   arguments would be joined with spaces); its literal text is shell syntax written by the
//!   campaign author, and every substituted value is POSIX single-quoted ([`shell_quote`])
//!   so that it stays one literal word. A placeholder must therefore stand outside quotes in
//!   the script: [`Template::placeholders_in_shell_quotes`] finds those that do not, for the
//!   validator to refuse (`"--x={{param:x}}"` would pass the quote characters on).
//!
//! Placeholder syntax: `{{` optional whitespace, an optional `namespace:` prefix, a name,
//! optional whitespace, `}}`. Namespaces and names consist of ASCII letters, digits, `_`,
//! `-` and `.`, and start with a letter or `_`. Literal text may surround placeholders
//! within an argument (`--volume={{param:volume}}`). A `{{` without a closing `}}` is an
//! error; there is no escape for a literal `{{` (a single `{` or `}` is plain text).

use std::fmt;

/// Namespaces the campaign format defines (`{{param:volume}}`, `{{input:density}}`, ...).
/// `program` (`{{program:engine}}`, the path of a declared program) is for shell scripts.
pub const NAMESPACES: &[&str] = &["param", "input", "output", "point", "program"];

/// Names usable without a namespace (`{{iteration}}`, `{{cpus}}`, ...).
pub const BARE_NAMES: &[&str] = &[
    "iteration",
    "cpus",
    "tasks",
    "seed",
    "stage",
    "campaign",
    "workdir",
];

/// A syntax error in one template argument.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("argument {arg}, character {column}: {message}")]
pub struct TemplateError {
    /// 0-based index of the argument in the `run` list.
    pub arg: usize,
    /// 1-based character (not byte) column within that argument where the problem starts.
    pub column: usize,
    /// What is wrong.
    pub message: String,
    /// What to do about it.
    pub hint: String,
}

/// A placeholder without a value at render time.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("argument {arg}: no value for {{{{{placeholder}}}}}")]
pub struct RenderError {
    /// 0-based index of the argument in the `run` list.
    pub arg: usize,
    /// The placeholder as written between the braces, e.g. `param:volume` or `cpus`.
    pub placeholder: String,
}

/// One placeholder occurrence with its position, for diagnostics.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PlaceholderRef<'a> {
    /// The namespace, if written (`param` in `{{param:volume}}`).
    pub namespace: Option<&'a str>,
    /// The name (`volume` in `{{param:volume}}`).
    pub name: &'a str,
    /// 0-based argument index.
    pub arg: usize,
    /// 1-based character column of the opening `{{` within the argument.
    pub column: usize,
}

#[derive(Debug, Clone, PartialEq, Eq)]
enum Piece {
    Literal(String),
    Placeholder {
        namespace: Option<String>,
        name: String,
        column: usize,
    },
}

/// A parsed command template: one list of pieces per argument.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Template {
    args: Vec<Vec<Piece>>,
}

fn is_ident_start(c: char) -> bool {
    c.is_ascii_alphabetic() || c == '_'
}

fn is_ident_char(c: char) -> bool {
    c.is_ascii_alphanumeric() || matches!(c, '_' | '-' | '.')
}

fn check_ident(
    what: &str,
    ident: &str,
    arg: usize,
    column: usize,
    inner: &str,
) -> Result<(), TemplateError> {
    let mut chars = ident.chars();
    let ok = match chars.next() {
        Some(c) => is_ident_start(c) && chars.all(is_ident_char),
        None => false,
    };
    if ok {
        return Ok(());
    }
    let message = if ident.is_empty() {
        format!("empty {what} in placeholder `{{{{{inner}}}}}`")
    } else {
        format!("invalid {what} `{ident}` in placeholder `{{{{{inner}}}}}`")
    };
    Err(TemplateError {
        arg,
        column,
        message,
        hint: "placeholders look like `{{param:volume}}` or `{{iteration}}`: letters, digits, \
               `_`, `-`, `.`, starting with a letter or `_`"
            .to_string(),
    })
}

fn parse_arg(arg: usize, text: &str) -> Result<Vec<Piece>, TemplateError> {
    let mut pieces = Vec::new();
    let mut literal = String::new();
    let mut rest = text;
    // Characters consumed so far (for 1-based char columns).
    let mut consumed = 0usize;
    while let Some(open) = rest.find("{{") {
        literal.push_str(&rest[..open]);
        let column = consumed + rest[..open].chars().count() + 1;
        let after = &rest[open + 2..];
        let Some(close) = after.find("}}") else {
            return Err(TemplateError {
                arg,
                column,
                message: "`{{` without a closing `}}`".to_string(),
                hint: "close the placeholder, e.g. `{{param:volume}}`; rondo has no escape for \
                       a literal `{{`"
                    .to_string(),
            });
        };
        let inner = &after[..close];
        if inner.contains("{{") {
            return Err(TemplateError {
                arg,
                column,
                message: "`{{` inside a placeholder".to_string(),
                hint: "placeholders cannot be nested; close the first one with `}}`".to_string(),
            });
        }
        let trimmed = inner.trim();
        let (namespace, name) = match trimmed.split_once(':') {
            Some((ns, name)) => {
                check_ident("namespace", ns, arg, column, inner)?;
                (Some(ns.to_string()), name)
            }
            None => (None, trimmed),
        };
        check_ident("name", name, arg, column, inner)?;
        if !literal.is_empty() {
            pieces.push(Piece::Literal(std::mem::take(&mut literal)));
        }
        pieces.push(Piece::Placeholder {
            namespace,
            name: name.to_string(),
            column,
        });
        let used = open + 2 + close + 2;
        consumed += rest[..used].chars().count();
        rest = &rest[used..];
    }
    literal.push_str(rest);
    if !literal.is_empty() || pieces.is_empty() {
        pieces.push(Piece::Literal(literal));
    }
    Ok(pieces)
}

impl Template {
    /// Parse a `run` list. Errors name the argument index and character column.
    pub fn parse(args: &[String]) -> Result<Template, TemplateError> {
        let args = args
            .iter()
            .enumerate()
            .map(|(i, a)| parse_arg(i, a))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(Template { args })
    }

    /// Number of arguments (including the program).
    pub fn len(&self) -> usize {
        self.args.len()
    }

    /// Whether the template has no arguments at all.
    pub fn is_empty(&self) -> bool {
        self.args.is_empty()
    }

    /// Every placeholder as `(namespace, name, argument index)`, in order of appearance.
    pub fn placeholders(&self) -> impl Iterator<Item = (Option<&str>, &str, usize)> + '_ {
        self.placeholder_refs()
            .map(|p| (p.namespace, p.name, p.arg))
    }

    /// Every placeholder with its character column, in order of appearance.
    pub fn placeholder_refs(&self) -> impl Iterator<Item = PlaceholderRef<'_>> + '_ {
        self.args.iter().enumerate().flat_map(|(arg, pieces)| {
            pieces.iter().filter_map(move |p| match p {
                Piece::Placeholder {
                    namespace,
                    name,
                    column,
                } => Some(PlaceholderRef {
                    namespace: namespace.as_deref(),
                    name,
                    arg,
                    column: *column,
                }),
                Piece::Literal(_) => None,
            })
        })
    }

    /// Render into an argument list: one output argument per template argument, values
    /// inserted verbatim. `lookup(namespace, name)` returns a placeholder's value.
    pub fn render(
        &self,
        lookup: impl Fn(Option<&str>, &str) -> Option<String>,
    ) -> Result<Vec<String>, RenderError> {
        self.args
            .iter()
            .enumerate()
            .map(|(i, pieces)| render_pieces(i, pieces, &lookup, |v| v.to_string()))
            .collect()
    }

    /// Render for a shell stage: `["/bin/sh", "-c", script]`, where the script is the
    /// template arguments joined with single spaces and every substituted value is
    /// single-quoted with [`shell_quote`].
    pub fn render_shell(
        &self,
        lookup: impl Fn(Option<&str>, &str) -> Option<String>,
    ) -> Result<Vec<String>, RenderError> {
        let parts = self
            .args
            .iter()
            .enumerate()
            .map(|(i, pieces)| render_pieces(i, pieces, &lookup, shell_quote))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(vec![
            "/bin/sh".to_string(),
            "-c".to_string(),
            parts.join(" "),
        ])
    }
}

impl Template {
    /// Placeholders that a shell would see inside single or double quotes, or right after a
    /// backslash, in the script [`Template::render_shell`] makes: their single-quoted values
    /// would not be one plain word there. The scan follows POSIX quoting (2.2 "Quoting"):
    /// `'...'`, `"..."` with `\` escapes inside double quotes, and `\` outside quotes.
    pub fn placeholders_in_shell_quotes(&self) -> Vec<PlaceholderRef<'_>> {
        #[derive(PartialEq)]
        enum Q {
            Out,
            Single,
            Double,
        }
        let mut q = Q::Out;
        let mut escaped = false;
        let mut found = Vec::new();
        for (arg, pieces) in self.args.iter().enumerate() {
            if arg > 0 {
                // Joined with a space.
                escaped = false;
            }
            for piece in pieces {
                match piece {
                    Piece::Literal(text) => {
                        for c in text.chars() {
                            if escaped {
                                escaped = false;
                                continue;
                            }
                            match (&q, c) {
                                (Q::Out, '\'') => q = Q::Single,
                                (Q::Out, '"') => q = Q::Double,
                                (Q::Out, '\\') | (Q::Double, '\\') => escaped = true,
                                (Q::Single, '\'') | (Q::Double, '"') => q = Q::Out,
                                _ => {}
                            }
                        }
                    }
                    Piece::Placeholder {
                        namespace,
                        name,
                        column,
                    } => {
                        if q != Q::Out || escaped {
                            found.push(PlaceholderRef {
                                namespace: namespace.as_deref(),
                                name,
                                arg,
                                column: *column,
                            });
                        }
                        escaped = false;
                    }
                }
            }
        }
        found
    }
}

fn render_pieces(
    arg: usize,
    pieces: &[Piece],
    lookup: &impl Fn(Option<&str>, &str) -> Option<String>,
    quote: impl Fn(&str) -> String,
) -> Result<String, RenderError> {
    let mut out = String::new();
    for piece in pieces {
        match piece {
            Piece::Literal(text) => out.push_str(text),
            Piece::Placeholder {
                namespace, name, ..
            } => {
                let value = lookup(namespace.as_deref(), name).ok_or_else(|| RenderError {
                    arg,
                    placeholder: match namespace {
                        Some(ns) => format!("{ns}:{name}"),
                        None => name.clone(),
                    },
                })?;
                out.push_str(&quote(&value));
            }
        }
    }
    Ok(out)
}

impl fmt::Display for Template {
    /// The template written back in its own syntax, arguments separated by spaces
    /// (for messages; not a shell-safe rendering).
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, pieces) in self.args.iter().enumerate() {
            if i > 0 {
                f.write_str(" ")?;
            }
            for piece in pieces {
                match piece {
                    Piece::Literal(t) => f.write_str(t)?,
                    Piece::Placeholder {
                        namespace: Some(ns),
                        name,
                        ..
                    } => write!(f, "{{{{{ns}:{name}}}}}")?,
                    Piece::Placeholder {
                        namespace: None,
                        name,
                        ..
                    } => write!(f, "{{{{{name}}}}}")?,
                }
            }
        }
        Ok(())
    }
}

/// Quote `value` as one POSIX shell word: wrapped in single quotes, each `'` written as
/// `'\''`. Inside single quotes the shell interprets nothing (POSIX.1-2017, Shell Command
/// Language, 2.2.2 "Single-Quotes"), so the word is the value byte for byte.
pub fn shell_quote(value: &str) -> String {
    let mut out = String::with_capacity(value.len() + 2);
    out.push('\'');
    for c in value.chars() {
        if c == '\'' {
            out.push_str("'\\''");
        } else {
            out.push(c);
        }
    }
    out.push('\'');
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn args(list: &[&str]) -> Vec<String> {
        list.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn parses_namespaced_and_bare_placeholders_with_literal_text() {
        let t = Template::parse(&args(&[
            "prog",
            "--v={{param:volume}}",
            "{{ iteration }}/{{input:rho}}.npy",
        ]))
        .unwrap();
        let found: Vec<_> = t.placeholders().collect();
        assert_eq!(
            found,
            vec![
                (Some("param"), "volume", 1),
                (None, "iteration", 2),
                (Some("input"), "rho", 2),
            ]
        );
        let cols: Vec<_> = t.placeholder_refs().map(|p| p.column).collect();
        assert_eq!(cols, vec![5, 1, 17]);
        assert_eq!(
            t.to_string(),
            "prog --v={{param:volume}} {{iteration}}/{{input:rho}}.npy"
        );
    }

    #[test]
    fn unclosed_placeholder_reports_argument_and_char_column() {
        // "é" is two bytes but one character: the column counts characters.
        let err = Template::parse(&args(&["prog", "é-{{param:x"])).unwrap_err();
        assert_eq!((err.arg, err.column), (1, 3));
        assert!(err.message.contains("without a closing"), "{err}");
        assert!(!err.hint.is_empty());
    }

    #[test]
    fn column_after_an_earlier_placeholder() {
        let err = Template::parse(&args(&["{{a}}é{{ }}"])).unwrap_err();
        assert_eq!((err.arg, err.column), (0, 7));
        assert!(err.message.contains("empty name"), "{err}");
    }

    #[test]
    fn rejects_bad_names() {
        for bad in [
            "{{param:}}",
            "{{:x}}",
            "{{1x}}",
            "{{a b}}",
            "{{p:x:y}}",
            "{{a{{b}}",
        ] {
            assert!(Template::parse(&args(&[bad])).is_err(), "{bad} accepted");
        }
    }

    #[test]
    fn single_braces_and_stray_closers_are_literal() {
        let t = Template::parse(&args(&["awk", "{print $1}", "a}}b"])).unwrap();
        assert_eq!(t.placeholders().count(), 0);
        let out = t.render(|_, _| None).unwrap();
        assert_eq!(out, args(&["awk", "{print $1}", "a}}b"]));
    }

    #[test]
    fn render_reports_missing_value() {
        let t = Template::parse(&args(&["prog", "{{param:volume}}"])).unwrap();
        let err = t.render(|_, _| None).unwrap_err();
        assert_eq!(err.arg, 1);
        assert_eq!(err.placeholder, "param:volume");
        assert_eq!(err.to_string(), "argument 1: no value for {{param:volume}}");
    }

    #[test]
    fn values_are_not_reparsed_for_placeholders() {
        let t = Template::parse(&args(&["{{param:a}}"])).unwrap();
        let out = t.render(|_, _| Some("{{param:b}}".into())).unwrap();
        assert_eq!(out, args(&["{{param:b}}"]));
    }

    #[test]
    fn shell_quote_cases() {
        assert_eq!(shell_quote(""), "''");
        assert_eq!(shell_quote("abc"), "'abc'");
        assert_eq!(shell_quote("it's"), "'it'\\''s'");
    }

    #[test]
    fn placeholders_inside_shell_quotes_are_found() {
        let t = Template::parse(&args(&[
            "{{program:p}} --a={{param:a}} \"--b={{param:b}}\" '{{param:c}}' \\{{param:d}} \"x\\\"\" {{param:e}} | tee 'l o g'",
        ]))
        .unwrap();
        let inside: Vec<&str> = t
            .placeholders_in_shell_quotes()
            .iter()
            .map(|p| p.name)
            .collect();
        assert_eq!(inside, ["b", "c", "d"]);
        // Rendered, each value is one quoted word.
        let out = t
            .render_shell(|ns, n| Some(format!("{}{n} $x", ns.unwrap_or(""))))
            .unwrap();
        assert!(
            out[2].starts_with("'programp $x' --a='parama $x' "),
            "{out:?}"
        );
    }

    #[test]
    fn empty_argument_stays_an_argument() {
        let t = Template::parse(&args(&["prog", ""])).unwrap();
        assert_eq!(t.render(|_, _| None).unwrap(), args(&["prog", ""]));
    }
}
