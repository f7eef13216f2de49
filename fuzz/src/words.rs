//! A POSIX shell word splitter for the quoting round trip: the words `/bin/sh` would see in
//! a script made only of words, blanks and quotes (POSIX.1-2017, Shell Command Language,
//! 2.2 "Quoting" and 2.3 "Token Recognition"), with no expansion and no operators.
//! Written here, independently of rondo's quoting, so that one checks the other.

/// The words of `script`, or `None` for an unterminated quote or a trailing backslash.
pub fn split(script: &str) -> Option<Vec<String>> {
    let mut words = Vec::new();
    let mut word = String::new();
    // Whether a word has started (so that `''` makes an empty word).
    let mut in_word = false;
    let mut chars = script.chars();
    while let Some(c) = chars.next() {
        match c {
            ' ' | '\t' | '\n' => {
                if in_word {
                    words.push(std::mem::take(&mut word));
                    in_word = false;
                }
            }
            '\'' => {
                in_word = true;
                loop {
                    match chars.next()? {
                        '\'' => break,
                        c => word.push(c),
                    }
                }
            }
            '"' => {
                in_word = true;
                loop {
                    match chars.next()? {
                        '"' => break,
                        '\\' => match chars.next()? {
                            '\n' => {}
                            c @ ('$' | '`' | '"' | '\\') => word.push(c),
                            c => {
                                word.push('\\');
                                word.push(c);
                            }
                        },
                        c => word.push(c),
                    }
                }
            }
            '\\' => match chars.next()? {
                '\n' => {}
                c => {
                    in_word = true;
                    word.push(c);
                }
            },
            c => {
                in_word = true;
                word.push(c);
            }
        }
    }
    if in_word {
        words.push(word);
    }
    Some(words)
}

#[cfg(test)]
mod tests {
    use super::split;

    #[test]
    fn quotes_escapes_and_empty_words() {
        let got = split(r#"a 'b c' "d\"e\$f\g" h\ i '' "" j'k'"l""#).unwrap();
        assert_eq!(
            got,
            ["a", "b c", "d\"e$f\\g", "h i", "", "", "jkl"].map(String::from)
        );
        assert_eq!(split("'it'\\''s'").unwrap(), ["it's"].map(String::from));
        assert_eq!(split("  \n\t ").unwrap(), Vec::<String>::new());
        assert_eq!(split("'open"), None);
        assert_eq!(split("x\\"), None);
    }
}
