//! The bundle's byte layout, independent of what a model stores in it.
//!
//! ```text
//! PLUMBLINE-BUNDLE\n                 magic line
//! format 1\n                         format version line
//! u64 LE  manifest length, then the manifest (UTF-8 JSON)
//! u32 LE  array count, then per array:
//!         u16 LE name length, name (UTF-8)
//!         u8 element type (1 = f64, 2 = u32, 3 = u8)
//!         u8 rank, rank × u64 LE dimensions
//!         the elements, little-endian, row-major
//! 32 bytes SHA-256 of every byte before it
//! ```
//! The checksum is checked before anything else is parsed, so a flipped
//! byte anywhere is reported as corruption, not as a confusing parse error.

use std::collections::BTreeMap;

use sha2::{Digest, Sha256};

pub const MAGIC: &[u8] = b"PLUMBLINE-BUNDLE\n";
pub const FORMAT_VERSION: u32 = 1;
const CHECKSUM_LEN: usize = 32;

/// Why a bundle's bytes were refused.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum FormatError {
    #[error("not a plumbline bundle: the file does not start with the bundle magic line")]
    NotABundle,
    #[error(
        "bundle format version {found} is not supported (this plumbline reads version {supported}); \
         refit the model or use a matching plumbline release"
    )]
    UnknownVersion { found: String, supported: u32 },
    #[error("bundle is truncated: {len} bytes is too short to hold a checksum")]
    TooShort { len: usize },
    #[error(
        "bundle checksum mismatch: the file is corrupted or was truncated \
         (stored {stored}, computed {computed})"
    )]
    ChecksumMismatch { stored: String, computed: String },
    #[error("bundle is malformed at byte {offset}: {what}")]
    Malformed { offset: usize, what: String },
}

/// Element storage of one array.
#[derive(Clone, Debug, PartialEq)]
pub enum Elements {
    F64(Vec<f64>),
    U32(Vec<u32>),
    U8(Vec<u8>),
}

impl Elements {
    fn len(&self) -> usize {
        match self {
            Elements::F64(v) => v.len(),
            Elements::U32(v) => v.len(),
            Elements::U8(v) => v.len(),
        }
    }
}

/// One named array.
#[derive(Clone, Debug, PartialEq)]
pub struct Array {
    pub shape: Vec<usize>,
    pub elements: Elements,
}

/// The decoded content of a bundle: its manifest and its arrays.
#[derive(Clone, Debug, PartialEq, Default)]
pub struct Sections {
    pub manifest: Vec<u8>,
    pub arrays: BTreeMap<String, Array>,
}

/// Encodes sections into bundle bytes, checksum included.
pub fn encode(sections: &Sections) -> Vec<u8> {
    let mut out = Vec::new();
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(format!("format {FORMAT_VERSION}\n").as_bytes());
    out.extend_from_slice(&(sections.manifest.len() as u64).to_le_bytes());
    out.extend_from_slice(&sections.manifest);
    out.extend_from_slice(&(sections.arrays.len() as u32).to_le_bytes());
    for (name, array) in &sections.arrays {
        debug_assert_eq!(array.shape.iter().product::<usize>(), array.elements.len());
        out.extend_from_slice(&(name.len() as u16).to_le_bytes());
        out.extend_from_slice(name.as_bytes());
        let tag: u8 = match array.elements {
            Elements::F64(_) => 1,
            Elements::U32(_) => 2,
            Elements::U8(_) => 3,
        };
        out.push(tag);
        out.push(array.shape.len() as u8);
        for d in &array.shape {
            out.extend_from_slice(&(*d as u64).to_le_bytes());
        }
        match &array.elements {
            Elements::F64(v) => v
                .iter()
                .for_each(|x| out.extend_from_slice(&x.to_le_bytes())),
            Elements::U32(v) => v
                .iter()
                .for_each(|x| out.extend_from_slice(&x.to_le_bytes())),
            Elements::U8(v) => out.extend_from_slice(v),
        }
    }
    let digest = Sha256::digest(&out);
    out.extend_from_slice(&digest);
    out
}

/// SHA-256 of the content (everything but the trailing checksum), hex.
pub fn content_hash(bytes: &[u8]) -> String {
    let body = &bytes[..bytes.len().saturating_sub(CHECKSUM_LEN)];
    hex(&Sha256::digest(body))
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// Decodes bundle bytes, checking magic, version and checksum first.
pub fn decode(bytes: &[u8]) -> Result<Sections, FormatError> {
    if !bytes.starts_with(MAGIC) {
        return Err(FormatError::NotABundle);
    }
    let rest = &bytes[MAGIC.len()..];
    let line_end = rest
        .iter()
        .position(|&b| b == b'\n')
        .ok_or(FormatError::Malformed {
            offset: MAGIC.len(),
            what: "no format version line".into(),
        })?;
    let version_line = String::from_utf8_lossy(&rest[..line_end]).into_owned();
    let found = version_line
        .strip_prefix("format ")
        .unwrap_or(&version_line)
        .to_string();
    if found != FORMAT_VERSION.to_string() {
        return Err(FormatError::UnknownVersion {
            found,
            supported: FORMAT_VERSION,
        });
    }
    if bytes.len() < CHECKSUM_LEN + MAGIC.len() + line_end + 1 {
        return Err(FormatError::TooShort { len: bytes.len() });
    }
    let (body, stored) = bytes.split_at(bytes.len() - CHECKSUM_LEN);
    let computed = Sha256::digest(body);
    if computed.as_slice() != stored {
        return Err(FormatError::ChecksumMismatch {
            stored: hex(stored),
            computed: hex(&computed),
        });
    }
    let mut r = Reader {
        bytes: body,
        pos: MAGIC.len() + line_end + 1,
    };
    let manifest_len = r.u64("manifest length")? as usize;
    let manifest = r.take(manifest_len, "manifest")?.to_vec();
    let count = r.u32("array count")?;
    let mut arrays = BTreeMap::new();
    for _ in 0..count {
        let name_len = r.u16("array name length")? as usize;
        let name = String::from_utf8(r.take(name_len, "array name")?.to_vec())
            .map_err(|_| r.malformed("array name is not UTF-8"))?;
        let tag = r.take(1, "element type")?[0];
        let rank = r.take(1, "array rank")?[0] as usize;
        let mut shape = Vec::with_capacity(rank);
        for _ in 0..rank {
            shape.push(r.u64("array dimension")? as usize);
        }
        let len = shape
            .iter()
            .try_fold(1usize, |acc, &d| acc.checked_mul(d))
            .ok_or_else(|| {
                r.malformed(&format!("array '{name}' has an impossible shape {shape:?}"))
            })?;
        let elements = match tag {
            1 => Elements::F64(
                r.take_elems(len, 8, &name)?
                    .chunks_exact(8)
                    .map(|c| f64::from_le_bytes(le_bytes(c)))
                    .collect(),
            ),
            2 => Elements::U32(
                r.take_elems(len, 4, &name)?
                    .chunks_exact(4)
                    .map(|c| u32::from_le_bytes(le_bytes(c)))
                    .collect(),
            ),
            3 => Elements::U8(r.take_elems(len, 1, &name)?.to_vec()),
            other => {
                return Err(
                    r.malformed(&format!("array '{name}' has unknown element type {other}"))
                );
            }
        };
        if arrays
            .insert(name.clone(), Array { shape, elements })
            .is_some()
        {
            return Err(r.malformed(&format!("array '{name}' appears twice")));
        }
    }
    if r.pos != body.len() {
        return Err(r.malformed(&format!("{} unexpected trailing bytes", body.len() - r.pos)));
    }
    Ok(Sections { manifest, arrays })
}

struct Reader<'a> {
    bytes: &'a [u8],
    pos: usize,
}

impl<'a> Reader<'a> {
    fn malformed(&self, what: &str) -> FormatError {
        FormatError::Malformed {
            offset: self.pos,
            what: what.to_string(),
        }
    }

    fn take(&mut self, n: usize, what: &str) -> Result<&'a [u8], FormatError> {
        let end = self.pos.checked_add(n).filter(|&e| e <= self.bytes.len());
        match end {
            Some(end) => {
                let s = &self.bytes[self.pos..end];
                self.pos = end;
                Ok(s)
            }
            None => Err(self.malformed(&format!("{what} runs past the end of the file"))),
        }
    }

    fn take_elems(
        &mut self,
        len: usize,
        width: usize,
        name: &str,
    ) -> Result<&'a [u8], FormatError> {
        let n = len
            .checked_mul(width)
            .ok_or_else(|| self.malformed(&format!("array '{name}' is impossibly large")))?;
        self.take(n, &format!("array '{name}'"))
    }

    fn u16(&mut self, what: &str) -> Result<u16, FormatError> {
        Ok(u16::from_le_bytes(le_bytes(self.take(2, what)?)))
    }
    fn u32(&mut self, what: &str) -> Result<u32, FormatError> {
        Ok(u32::from_le_bytes(le_bytes(self.take(4, what)?)))
    }
    fn u64(&mut self, what: &str) -> Result<u64, FormatError> {
        Ok(u64::from_le_bytes(le_bytes(self.take(8, what)?)))
    }
}

/// The first `N` bytes of `b` as an array (zero-padded if shorter): callers
/// pass slices of exactly `N` bytes (`take(N)`, `chunks_exact(N)`).
fn le_bytes<const N: usize>(b: &[u8]) -> [u8; N] {
    let mut out = [0u8; N];
    for (o, v) in out.iter_mut().zip(b) {
        *o = *v;
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> Sections {
        let mut s = Sections {
            manifest: br#"{"a":1}"#.to_vec(),
            ..Default::default()
        };
        s.arrays.insert(
            "x".into(),
            Array {
                shape: vec![2, 3],
                elements: Elements::F64(vec![1.0, -2.5, f64::MIN_POSITIVE, 0.0, 7.0, 1e300]),
            },
        );
        s.arrays.insert(
            "f".into(),
            Array {
                shape: vec![4],
                elements: Elements::U32(vec![0, 1, 2, u32::MAX]),
            },
        );
        s.arrays.insert(
            "m".into(),
            Array {
                shape: vec![2],
                elements: Elements::U8(vec![0, 1]),
            },
        );
        s
    }

    #[test]
    fn round_trips_bit_for_bit() {
        let bytes = encode(&sample());
        let back = decode(&bytes).unwrap();
        assert_eq!(back, sample());
        assert_eq!(encode(&back), bytes);
    }

    #[test]
    fn every_flipped_byte_is_refused() {
        let bytes = encode(&sample());
        for i in 0..bytes.len() {
            let mut b = bytes.clone();
            b[i] ^= 0x10;
            assert!(decode(&b).is_err(), "flip at byte {i} accepted");
        }
    }

    #[test]
    fn every_truncation_is_refused() {
        let bytes = encode(&sample());
        for len in 0..bytes.len() {
            assert!(
                decode(&bytes[..len]).is_err(),
                "truncation to {len} accepted"
            );
        }
    }

    #[test]
    fn unknown_version_names_the_version() {
        let mut bytes = encode(&sample());
        let at = MAGIC.len() + "format ".len();
        bytes[at] = b'9';
        match decode(&bytes) {
            Err(FormatError::UnknownVersion { found, .. }) => assert_eq!(found, "9"),
            other => panic!("expected UnknownVersion, got {other:?}"),
        }
    }
}
