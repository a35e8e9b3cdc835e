//! Small helpers for messages and for reading the text files a user gives.

use std::io::Read;
use std::path::Path;

use crate::Error;

/// Read the text file `path` given by the user (a scenario, a rows file): only a regular file is read, so a
/// FIFO or a device is refused at once instead of blocking (see [`crate::stages::wav_file::open_regular`]).
pub fn read_user_text(path: &Path, what: &str) -> Result<String, Error> {
    let (mut f, len) = crate::stages::wav_file::open_regular(path, what)?;
    let mut s = String::with_capacity(len.min(1 << 24) as usize);
    f.read_to_string(&mut s).map_err(|source| Error::Read {
        path: path.to_path_buf(),
        source,
    })?;
    Ok(s)
}

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
