//! Command templates (`rondo_adapters::template`): parsing against an independent reading of
//! the documented syntax, argv rendering (one output argument per template argument, never
//! split or merged), and shell rendering (every value one quoted word that splits back to
//! exactly the argv).
//!
//! Input: template arguments, one a line, then optionally a NUL and the values the
//! placeholders take, one a line (a placeholder's value is chosen by its name; names that
//! start with `z` have none, to exercise the missing-value error).

use rondo_adapters::template::{shell_quote, Template};

use crate::words;

/// Values used when the input brings none: blanks, quotes, shell syntax, a placeholder.
const DEFAULT_VALUES: &[&str] = &[
    "",
    "a b",
    "it's",
    "$x; `rm -rf /` \\\"q\"",
    "{{param:v}}",
    "tab\there\nnew line",
    "é ünïcödé",
];

/// Characters a literal may hold for the shell rendering to split back to the argv: no
/// blank, quote, backslash, brace or shell operator.
fn shell_plain(c: char) -> bool {
    c.is_ascii_alphanumeric() || "_-./=,:+%@^".contains(c)
}

/// One piece of an argument as the documented syntax reads it.
#[derive(Debug, PartialEq)]
enum Part {
    Lit(String),
    Ph(Option<String>, String),
}

fn ident_ok(s: &str) -> bool {
    let mut cs = s.chars();
    matches!(cs.next(), Some(c) if c.is_ascii_alphabetic() || c == '_')
        && cs.all(|c| c.is_ascii_alphanumeric() || "_-.".contains(c))
}

/// The documented syntax, read character by character: `{{`, optional whitespace, optional
/// `namespace:`, a name, optional whitespace, `}}`; an unclosed or nested `{{` is an error.
fn reference_parts(arg: &str) -> Option<Vec<Part>> {
    let cs: Vec<char> = arg.chars().collect();
    let mut parts = Vec::new();
    let mut lit = String::new();
    let mut i = 0;
    while i < cs.len() {
        if cs[i] == '{' && cs.get(i + 1) == Some(&'{') {
            // Find the first `}}` after the opening; a `{{` before it is a nesting error.
            let mut j = i + 2;
            let close = loop {
                if j + 1 >= cs.len() {
                    return None;
                }
                if cs[j] == '}' && cs[j + 1] == '}' {
                    break j;
                }
                j += 1;
            };
            let inner: String = cs[i + 2..close].iter().collect();
            if inner.contains("{{") {
                return None;
            }
            let inner = inner.trim();
            let (ns, name) = match inner.split_once(':') {
                Some((ns, name)) => (Some(ns), name),
                None => (None, inner),
            };
            if ns.is_some_and(|n| !ident_ok(n)) || !ident_ok(name) {
                return None;
            }
            if !lit.is_empty() {
                parts.push(Part::Lit(std::mem::take(&mut lit)));
            }
            parts.push(Part::Ph(ns.map(String::from), name.to_string()));
            i = close + 2;
        } else {
            lit.push(cs[i]);
            i += 1;
        }
    }
    if !lit.is_empty() {
        parts.push(Part::Lit(lit));
    }
    Some(parts)
}

/// The value of a placeholder: chosen from `values` by its name, none for names starting
/// with `z`.
fn value_of<'a>(values: &'a [String], ns: Option<&str>, name: &str) -> Option<&'a str> {
    if name.starts_with('z') {
        return None;
    }
    let h = ns
        .unwrap_or("")
        .bytes()
        .chain(name.bytes())
        .fold(0usize, |h, b| h.wrapping_mul(31).wrapping_add(b as usize));
    values.get(h % values.len().max(1)).map(String::as_str)
}

/// Check one template input (see the module doc).
pub fn check(text: &str) {
    let (tpl, vals) = text.split_once('\0').unwrap_or((text, ""));
    let args: Vec<String> = tpl.split('\n').map(String::from).collect();
    let mut values: Vec<String> = vals.split('\n').map(String::from).collect();
    if vals.is_empty() {
        values = DEFAULT_VALUES.iter().map(|s| s.to_string()).collect();
    }
    check_args(&args, &values);
    // Quoting alone, on every value: one quoted word that splits back to the value.
    let script: Vec<String> = values.iter().map(|v| shell_quote(v)).collect();
    assert_eq!(
        words::split(&script.join(" ")).as_deref(),
        Some(&values[..]),
        "shell_quote does not round-trip {values:?}"
    );
}

/// Check one parsed run list against the reference reading, with `values`.
pub fn check_args(args: &[String], values: &[String]) {
    let reference: Vec<Option<Vec<Part>>> = args.iter().map(|a| reference_parts(a)).collect();
    let parsed = Template::parse(args);
    let t = match parsed {
        Err(e) => {
            let first_bad = reference.iter().position(Option::is_none);
            assert_eq!(
                Some(e.arg),
                first_bad,
                "template error at argument {} but the reference reading fails at {first_bad:?}: {e} ({args:?})",
                e.arg
            );
            let len = args[e.arg].chars().count();
            assert!(
                e.column >= 1 && e.column <= len,
                "template error column {} outside argument {} of {len} characters: {e}",
                e.column,
                e.arg
            );
            assert!(!e.message.is_empty() && !e.hint.is_empty(), "{e:?}");
            return;
        }
        Ok(t) => t,
    };
    let reference: Vec<Vec<Part>> = match reference.into_iter().collect::<Option<Vec<_>>>() {
        Some(r) => r,
        None => panic!("template parsed but the reference reading refuses it: {args:?}"),
    };
    assert_eq!(t.len(), args.len(), "argument count changed: {args:?}");
    let want_refs: Vec<(Option<&str>, &str, usize)> = reference
        .iter()
        .enumerate()
        .flat_map(|(i, parts)| {
            parts.iter().filter_map(move |p| match p {
                Part::Ph(ns, name) => Some((ns.as_deref(), name.as_str(), i)),
                Part::Lit(_) => None,
            })
        })
        .collect();
    let got_refs: Vec<_> = t.placeholders().collect();
    assert_eq!(got_refs, want_refs, "placeholders differ: {args:?}");
    for p in t.placeholder_refs() {
        let arg: Vec<char> = args[p.arg].chars().collect();
        assert!(
            p.column >= 1 && arg.get(p.column - 1) == Some(&'{') && arg.get(p.column) == Some(&'{'),
            "placeholder column {} does not point at its `{{{{` in {:?}",
            p.column,
            args[p.arg]
        );
    }
    let lookup = |ns: Option<&str>, name: &str| value_of(values, ns, name).map(String::from);
    let missing = want_refs
        .iter()
        .find(|(ns, name, _)| value_of(values, *ns, name).is_none());
    let argv = match (t.render(lookup), missing) {
        (Err(e), Some((ns, name, arg))) => {
            let want = match ns {
                Some(ns) => format!("{ns}:{name}"),
                None => name.to_string(),
            };
            assert_eq!((e.arg, e.placeholder.as_str()), (*arg, want.as_str()));
            assert!(t.render_shell(lookup).is_err());
            return;
        }
        (Err(e), None) => panic!("render failed with every value present: {e} ({args:?})"),
        (Ok(argv), Some(m)) => panic!("render succeeded without a value for {m:?}: {argv:?}"),
        (Ok(argv), None) => argv,
    };
    // Never split or merged: exactly the reference rendering, argument by argument.
    let want: Vec<String> = reference
        .iter()
        .map(|parts| {
            parts
                .iter()
                .map(|p| match p {
                    Part::Lit(s) => s.as_str(),
                    Part::Ph(ns, name) => value_of(values, ns.as_deref(), name).unwrap_or(""),
                })
                .collect()
        })
        .collect();
    assert_eq!(
        argv, want,
        "argv rendering differs from the template: {args:?}"
    );
    let shell = match t.render_shell(lookup) {
        Ok(s) => s,
        Err(e) => panic!("shell render failed where argv render passed: {e}"),
    };
    assert_eq!(shell.len(), 3, "{shell:?}");
    assert_eq!((shell[0].as_str(), shell[1].as_str()), ("/bin/sh", "-c"));
    // With plain literals, the script splits back to exactly the argv.
    let plain = reference.iter().all(|parts| {
        !parts.is_empty()
            && parts.iter().all(|p| match p {
                Part::Lit(s) => s.chars().all(shell_plain),
                Part::Ph(..) => true,
            })
    });
    if plain {
        assert!(
            t.placeholders_in_shell_quotes().is_empty(),
            "a placeholder among plain literals is reported as quoted: {args:?}"
        );
        assert_eq!(
            words::split(&shell[2]).as_ref(),
            Some(&argv),
            "shell script {:?} does not split back to the argv",
            shell[2]
        );
    }
}
