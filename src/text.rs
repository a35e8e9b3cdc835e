//! Small helpers for messages.

/// Longest piece of user input echoed back in a message, in characters.
pub const ECHO_MAX_CHARS: usize = 60;

/// `s` cut to [`ECHO_MAX_CHARS`] characters (with "..." and the full length when cut), control characters
/// shown as `?`, so a message that echoes what the user gave stays one readable line.
pub fn clip(s: &str) -> String {
    let n = s.chars().count();
    let mut out: String = s
        .chars()
        .take(ECHO_MAX_CHARS)
        .map(|c| if c.is_control() { '?' } else { c })
        .collect();
    if n > ECHO_MAX_CHARS {
        out.push_str(&format!("... ({n} characters)"));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn long_input_is_cut_and_short_input_kept() {
        assert_eq!(clip("1 kHz"), "1 kHz");
        let long = "x".repeat(10_000);
        let c = clip(&long);
        assert!(c.len() < 100, "{c}");
        assert!(c.ends_with("(10000 characters)"), "{c}");
        assert_eq!(clip("a\nb"), "a?b");
    }
}
