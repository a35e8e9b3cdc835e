//! NumPy `.npy` files: the preamble of a one-dimensional structured array, written before its rows.
//!
//! The layout follows the NumPy format description (NEP 1, "A simple file format for NumPy arrays", and the
//! `numpy.lib.format` documentation): the magic string `\x93NUMPY`, the format version (1.0: two bytes `1, 0`),
//! the header's length as a little-endian u16, then the header: the ASCII text of a Python dict literal with
//! the keys `descr`, `fortran_order` and `shape`, padded with spaces and ended by `\n` so that the whole
//! preamble is a multiple of 64 bytes long (NumPy pads to 64 since 1.20; the format asks for 16). When the
//! header would not fit a u16 (thousands of fields), version 2.0 is written instead: the same with a u32
//! length. The data follows in C order: each row's fields packed in the order of `descr`, little-endian.

/// One field of the structured array: its name and NumPy type string (`<f8`, `<u4`).
#[derive(Debug, Clone, PartialEq)]
pub struct Field {
    pub name: String,
    pub dtype: &'static str,
}

impl Field {
    pub fn f64(name: &str) -> Field {
        Field {
            name: name.to_string(),
            dtype: "<f8",
        }
    }
    pub fn u32(name: &str) -> Field {
        Field {
            name: name.to_string(),
            dtype: "<u4",
        }
    }
    /// Bytes this field takes in a row.
    pub fn size(&self) -> usize {
        match self.dtype {
            "<f8" => 8,
            "<u4" => 4,
            _ => 0,
        }
    }
}

const MAGIC: &[u8] = b"\x93NUMPY";
const ALIGN: usize = 64;
/// The widest row count (u64::MAX has 20 digits): the preamble is sized for it, so that the count can be
/// rewritten in place at the end without moving the data.
const WIDEST_COUNT: u64 = u64::MAX;

fn dict(fields: &[Field], rows: u64) -> String {
    let mut d = String::from("{'descr': [");
    for (i, f) in fields.iter().enumerate() {
        if i > 0 {
            d.push_str(", ");
        }
        d.push_str(&format!("('{}', '{}')", f.name, f.dtype));
    }
    d.push_str(&format!(
        "], 'fortran_order': False, 'shape': ({rows},), }}"
    ));
    d
}

/// The preamble of a file holding `rows` rows of `fields`. Its length depends on the fields only, never on
/// `rows`, so [`preamble`] with the final count may overwrite the one written first. Field names must be
/// plain (letters, digits, `_`): they are written between single quotes without escapes.
pub fn preamble(fields: &[Field], rows: u64) -> Vec<u8> {
    let widest = dict(fields, WIDEST_COUNT).len() + 1; // + '\n'
    let text = dict(fields, rows);
    let (version, len_bytes) = if MAGIC.len() + 2 + 2 + widest <= usize::from(u16::MAX) {
        (1u8, 2)
    } else {
        (2u8, 4)
    };
    let fixed = MAGIC.len() + 2 + len_bytes;
    let total = (fixed + widest).div_ceil(ALIGN) * ALIGN;
    let header_len = total - fixed;
    let mut out = Vec::with_capacity(total);
    out.extend_from_slice(MAGIC);
    out.push(version);
    out.push(0);
    if version == 1 {
        out.extend_from_slice(&(header_len as u16).to_le_bytes());
    } else {
        out.extend_from_slice(&(header_len as u32).to_le_bytes());
    }
    out.extend_from_slice(text.as_bytes());
    out.resize(total - 1, b' ');
    out.push(b'\n');
    out
}

/// Names made distinct for a structured array (NumPy refuses a dtype with a repeated field name): a repeated
/// name gets `_2`, `_3`, ... in the order the names come.
pub fn distinct_names(names: &[String]) -> Vec<String> {
    let mut out: Vec<String> = Vec::with_capacity(names.len());
    for n in names {
        let mut name = if n.is_empty() {
            "f".to_string()
        } else {
            n.clone()
        };
        let mut k = 2;
        while out.contains(&name) {
            name = format!("{n}_{k}");
            k += 1;
        }
        out.push(name);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    // The expected bytes follow the format description of NEP 1 / the numpy.lib.format documentation: magic
    // "\x93NUMPY", major 1, minor 0, u16 little-endian header length, a dict literal with 'descr',
    // 'fortran_order' and 'shape', space padding, a final '\n', the total a multiple of 64 (what numpy.save
    // writes since NumPy 1.20).
    #[test]
    fn preamble_is_a_version_1_header_of_a_structured_array() {
        let fields = [Field::f64("time_s"), Field::u32("adc")];
        let p = preamble(&fields, 1234);
        assert_eq!(&p[..6], b"\x93NUMPY");
        assert_eq!(p[6..8], [1, 0]);
        let hl = u16::from_le_bytes([p[8], p[9]]) as usize;
        assert_eq!(10 + hl, p.len());
        assert_eq!(p.len() % 64, 0);
        assert_eq!(*p.last().unwrap(), b'\n');
        let text = std::str::from_utf8(&p[10..]).unwrap();
        assert!(
            text.starts_with(
                "{'descr': [('time_s', '<f8'), ('adc', '<u4')], 'fortran_order': False, \
                 'shape': (1234,), }"
            ),
            "{text}"
        );
        let tail = &text[text.find('}').unwrap() + 1..];
        assert!(tail[..tail.len() - 1].bytes().all(|b| b == b' '));
    }

    #[test]
    fn the_count_can_be_rewritten_in_place() {
        let fields = [Field::f64("a_v")];
        let first = preamble(&fields, 0);
        for rows in [1, 99, 1_000_000, u64::MAX] {
            assert_eq!(preamble(&fields, rows).len(), first.len(), "{rows}");
        }
    }

    #[test]
    fn a_very_wide_header_moves_to_version_2() {
        let fields: Vec<Field> = (0..5000)
            .map(|i| Field::f64(&format!("stream{i}_v")))
            .collect();
        let p = preamble(&fields, 5);
        assert_eq!(p[6..8], [2, 0]);
        let hl = u32::from_le_bytes([p[8], p[9], p[10], p[11]]) as usize;
        assert_eq!(12 + hl, p.len());
        assert_eq!(p.len() % 64, 0);
    }

    #[test]
    fn repeated_names_are_made_distinct() {
        let n: Vec<String> = ["a", "b", "a", "a"].iter().map(|s| s.to_string()).collect();
        assert_eq!(distinct_names(&n), ["a", "b", "a_2", "a_3"]);
    }
}
