//! Rendered templates run as real child processes: hostile values arrive as one literal
//! argument, both in argument-list mode and in shell mode.

use std::process::Command;

use rondo_adapters::template::{shell_quote, Template};

/// Values that would break a naive string-built command line.
const HOSTILE: &[&str] = &[
    "x; touch /tmp/pwned",
    "$(id)",
    "`id`",
    "it's \"quoted\"",
    "'",
    "''",
    "line one\nline two\n",
    "",
    " leading and trailing ",
    "tab\there",
    "Matsubara ω_n = (2n+1)π/β — ünïcødé",
    "*",
    "~",
    "a\\b\\",
    "${HOME}",
    "-n",
    "--",
    "{{param:other}}",
];

fn args(list: &[&str]) -> Vec<String> {
    list.iter().map(|s| s.to_string()).collect()
}

/// Run argv and return the arguments the child received (printed NUL-separated by sh).
fn received(argv: &[String]) -> Vec<String> {
    let out = Command::new(&argv[0])
        .args(&argv[1..])
        .output()
        .expect("spawn child");
    assert!(out.status.success(), "child failed: {:?}", out);
    let text = String::from_utf8(out.stdout).expect("utf-8 output");
    let mut parts: Vec<String> = text.split('\0').map(str::to_string).collect();
    // printf '%s\0' ends every argument with NUL, so the last split part is empty.
    assert_eq!(parts.pop().as_deref(), Some(""));
    parts
}

#[test]
fn argument_mode_passes_each_value_as_one_literal_argument() {
    // `sh -c 'printf "%s\0" "$@"' sh ARG...` prints exactly the arguments it received.
    let template = Template::parse(&args(&[
        "/bin/sh",
        "-c",
        "printf '%s\\0' \"$@\"",
        "sh",
        "{{param:v}}",
        "pre-{{param:v}}-post",
    ]))
    .unwrap();
    let marker = tempfile::tempdir().unwrap();
    let pwned = marker.path().join("pwned");
    let mut values: Vec<String> = HOSTILE.iter().map(|s| s.to_string()).collect();
    values.push(format!("x; touch {}", pwned.display()));
    values.push(format!("$(touch {})", pwned.display()));
    for value in &values {
        let argv = template
            .render(|ns, name| (ns == Some("param") && name == "v").then(|| value.clone()))
            .unwrap();
        let got = received(&argv);
        assert_eq!(
            got,
            vec![value.clone(), format!("pre-{value}-post")],
            "value {value:?}"
        );
    }
    assert!(!pwned.exists(), "a substituted value was executed");
}

#[test]
fn shell_mode_keeps_each_quoted_value_one_word() {
    // The literal parts are shell syntax; the substituted values must stay single words.
    let template = Template::parse(&args(&[
        "printf",
        "'%s\\0'",
        "{{param:v}}",
        "pre-{{param:v}}-post",
        "{{param:v}}{{param:v}}",
    ]))
    .unwrap();
    let marker = tempfile::tempdir().unwrap();
    let pwned = marker.path().join("pwned");
    let mut values: Vec<String> = HOSTILE.iter().map(|s| s.to_string()).collect();
    values.push(format!("x; touch {}", pwned.display()));
    values.push(format!("$(touch {})", pwned.display()));
    for value in &values {
        let argv = template
            .render_shell(|ns, name| (ns == Some("param") && name == "v").then(|| value.clone()))
            .unwrap();
        assert_eq!(argv[..2], args(&["/bin/sh", "-c"]));
        assert_eq!(argv.len(), 3);
        let got = received(&argv);
        assert_eq!(
            got,
            vec![
                value.clone(),
                format!("pre-{value}-post"),
                format!("{value}{value}")
            ],
            "value {value:?}, script {:?}",
            argv[2]
        );
    }
    assert!(!pwned.exists(), "a substituted value was executed");
}

#[test]
fn shell_quote_round_trips_through_a_real_shell() {
    for value in HOSTILE {
        let script = format!("printf '%s\\0' {}", shell_quote(value));
        let got = received(&args(&["/bin/sh", "-c", &script]));
        assert_eq!(got, vec![value.to_string()], "value {value:?}");
    }
}

#[test]
fn shell_mode_literal_text_is_shell_syntax() {
    // The campaign author's own text is a script: pipes and redirections work.
    let template = Template::parse(&args(&[
        "printf",
        "'%s\\0'",
        "{{param:v}}",
        "|",
        "tr",
        "a",
        "b",
    ]))
    .unwrap();
    let argv = template
        .render_shell(|_, _| Some("banana; echo a".to_string()))
        .unwrap();
    assert_eq!(received(&argv), vec!["bbnbnb; echo b".to_string()]);
}
