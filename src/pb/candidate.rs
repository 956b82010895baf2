//! `plumbline.v1.Candidate`, written by hand rather than generated, for
//! one reason: its descriptors. prost decodes a packed `repeated double`
//! one element at a time (a bounds check, a read and a `Vec::push` that
//! regrows the vector), which was about 7% of the server's CPU time on the
//! serving benchmark's batches of 200-descriptor candidates (`perf`,
//! 2026-12-02). Here a packed run that lies whole in the buffer is copied
//! in one pass into a vector sized once. Anything else (an unpacked
//! element, a run split across buffer chunks, a length that is not a
//! whole number of doubles or runs past the buffer) goes to prost's own
//! decoder, so its answers and errors stay prost's. The encoding is
//! prost's, field for field. `build.rs` maps the proto type here with
//! `extern_path`; the tests check it against a prost-generated twin.

use prost::bytes::{Buf, BufMut};
use prost::encoding::{self, DecodeContext, WireType};
use prost::{DecodeError, Message};

/// A candidate to score: its id and its descriptor values, in the order of
/// the request's `descriptor_names` (or the model's).
#[derive(Clone, PartialEq, Default, Debug)]
pub struct Candidate {
    pub id: String,
    pub descriptors: Vec<f64>,
}

const ID: u32 = 1;
const DESCRIPTORS: u32 = 2;

impl Message for Candidate {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        if !self.id.is_empty() {
            encoding::string::encode(ID, &self.id, buf);
        }
        encoding::double::encode_packed(DESCRIPTORS, &self.descriptors, buf);
    }

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        let in_field = |field: &'static str| {
            move |mut e: DecodeError| {
                e.push("Candidate", field);
                e
            }
        };
        match tag {
            ID => {
                encoding::string::merge(wire_type, &mut self.id, buf, ctx).map_err(in_field("id"))
            }
            DESCRIPTORS => merge_doubles(wire_type, &mut self.descriptors, buf, ctx)
                .map_err(in_field("descriptors")),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        let id = if self.id.is_empty() {
            0
        } else {
            encoding::string::encoded_len(ID, &self.id)
        };
        id + encoding::double::encoded_len_packed(DESCRIPTORS, &self.descriptors)
    }

    fn clear(&mut self) {
        self.id.clear();
        self.descriptors.clear();
    }
}

/// Appends a `repeated double` field's values to `values`.
fn merge_doubles(
    wire_type: WireType,
    values: &mut Vec<f64>,
    buf: &mut impl Buf,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    if wire_type == WireType::LengthDelimited
        && let Some((header, len)) = whole_packed_run(buf)
    {
        buf.advance(header);
        let bytes = &buf.chunk()[..len];
        values.extend(
            bytes
                .chunks_exact(8)
                .map(|b| f64::from_le_bytes([b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7]])),
        );
        buf.advance(len);
        return Ok(());
    }
    encoding::double::merge_repeated(wire_type, values, buf, ctx)
}

/// The length of the length prefix and of the packed run after it, when
/// both lie whole in the buffer's current chunk and the run is a whole
/// number of doubles; the buffer is not advanced.
fn whole_packed_run(buf: &impl Buf) -> Option<(usize, usize)> {
    let chunk = buf.chunk();
    let mut rest = chunk;
    let len = usize::try_from(encoding::decode_varint(&mut rest).ok()?).ok()?;
    let header = chunk.len() - rest.len();
    (len % 8 == 0 && len <= rest.len()).then_some((header, len))
}

#[cfg(test)]
mod tests {
    use super::*;
    use prost::bytes::Bytes;
    use rand::{Rng, SeedableRng};
    use rand_xoshiro::Xoshiro256PlusPlus;

    /// What prost generates for the same proto message, as the reference
    /// the hand-written one must match on the wire (prost-derive, the
    /// generator `build.rs` uses for every other message).
    #[derive(Clone, PartialEq, prost::Message)]
    struct Generated {
        #[prost(string, tag = "1")]
        id: String,
        #[prost(double, repeated, tag = "2")]
        descriptors: Vec<f64>,
    }

    /// The same candidate with an extra field the server does not know,
    /// as a newer client might send.
    #[derive(Clone, PartialEq, prost::Message)]
    struct Newer {
        #[prost(string, tag = "1")]
        id: String,
        #[prost(double, repeated, tag = "2")]
        descriptors: Vec<f64>,
        #[prost(string, tag = "7")]
        note: String,
    }

    fn values(rng: &mut Xoshiro256PlusPlus, n: usize) -> Vec<f64> {
        (0..n)
            .map(|i| match i % 7 {
                0 => f64::NAN,
                1 => -0.0,
                2 => f64::INFINITY,
                _ => rng.gen_range(-1e6..1e6),
            })
            .collect()
    }

    fn bits(v: &[f64]) -> Vec<u64> {
        v.iter().map(|x| x.to_bits()).collect()
    }

    #[test]
    fn encodes_byte_for_byte_as_prost_does() {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(5);
        for n in [0, 1, 2, 200, 1000] {
            for id in ["", "c-17", "ünïcode"] {
                let d = values(&mut rng, n);
                let ours = Candidate {
                    id: id.into(),
                    descriptors: d.clone(),
                };
                let theirs = Generated {
                    id: id.into(),
                    descriptors: d,
                };
                assert_eq!(
                    ours.encode_to_vec(),
                    theirs.encode_to_vec(),
                    "n {n}, id {id:?}"
                );
                assert_eq!(ours.encoded_len(), theirs.encoded_len());
            }
        }
    }

    #[test]
    fn decodes_what_prost_encodes_to_the_bit() {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(6);
        for n in [0, 1, 3, 200, 4096] {
            let theirs = Generated {
                id: format!("cand-{n}"),
                descriptors: values(&mut rng, n),
            };
            let ours = Candidate::decode(Bytes::from(theirs.encode_to_vec())).unwrap();
            assert_eq!(ours.id, theirs.id);
            assert_eq!(bits(&ours.descriptors), bits(&theirs.descriptors));
        }
    }

    /// Unpacked elements (legal on the wire, sent by some encoders), a
    /// field repeated in two runs, unknown fields, and a run split across
    /// two buffer chunks all decode as prost decodes them.
    #[test]
    fn every_legal_layout_decodes_as_prost_does() {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(7);
        let d = values(&mut rng, 50);
        let mut layouts: Vec<(&str, Vec<u8>)> = Vec::new();

        let mut unpacked = Vec::new();
        encoding::string::encode(ID, &"u".to_string(), &mut unpacked);
        encoding::double::encode_repeated(DESCRIPTORS, &d, &mut unpacked);
        layouts.push(("unpacked", unpacked));

        let mut two_runs = Vec::new();
        encoding::double::encode_packed(DESCRIPTORS, &d[..20], &mut two_runs);
        encoding::string::encode(ID, &"t".to_string(), &mut two_runs);
        encoding::double::encode_packed(DESCRIPTORS, &d[20..], &mut two_runs);
        encoding::double::encode(DESCRIPTORS, &d[0], &mut two_runs);
        layouts.push(("two packed runs and one unpacked", two_runs));

        let newer = Newer {
            id: "n".into(),
            descriptors: d.clone(),
            note: "from a newer client".into(),
        };
        layouts.push(("an unknown field", newer.encode_to_vec()));

        for (what, bytes) in &layouts {
            let theirs = Generated::decode(bytes.as_slice()).unwrap();
            let ours = Candidate::decode(bytes.as_slice()).unwrap();
            assert_eq!(ours.id, theirs.id, "{what}");
            assert_eq!(bits(&ours.descriptors), bits(&theirs.descriptors), "{what}");
        }

        // A run split across two chunks at every byte: prost's own path.
        let whole = Generated {
            id: "s".into(),
            descriptors: d[..5].to_vec(),
        }
        .encode_to_vec();
        for cut in 0..=whole.len() {
            let mut buf = Buf::chain(&whole[..cut], &whole[cut..]);
            let ours = Candidate::decode(&mut buf).unwrap();
            assert_eq!(bits(&ours.descriptors), bits(&d[..5]), "cut at {cut}");
        }
    }

    /// Malformed input fails exactly where prost's decoder fails: a packed
    /// run whose length is not a whole number of doubles, one that runs
    /// past the buffer, and every truncation of a good message.
    #[test]
    fn rejects_what_prost_rejects() {
        let good = Generated {
            id: "g".into(),
            descriptors: vec![1.5, -2.25, 3.0],
        }
        .encode_to_vec();
        for cut in 0..good.len() {
            let theirs = Generated::decode(&good[..cut]);
            let ours = Candidate::decode(&good[..cut]);
            assert_eq!(ours.is_ok(), theirs.is_ok(), "truncated at {cut}");
        }
        // Field 2, length-delimited, 12 bytes: one and a half doubles.
        let mut ragged = vec![0x12, 12];
        ragged.extend_from_slice(&[0u8; 12]);
        assert!(Generated::decode(ragged.as_slice()).is_err());
        assert!(Candidate::decode(ragged.as_slice()).is_err());
        // Field 2 claiming 16 bytes where 8 follow.
        let mut short = vec![0x12, 16];
        short.extend_from_slice(&[0u8; 8]);
        assert!(Generated::decode(short.as_slice()).is_err());
        assert!(Candidate::decode(short.as_slice()).is_err());
    }

    #[test]
    fn decoding_into_a_used_message_appends_as_prost_merges() {
        let first = Generated {
            id: "a".into(),
            descriptors: vec![1.0, 2.0],
        };
        let second = Generated {
            id: "b".into(),
            descriptors: vec![3.0],
        };
        let mut theirs = first.clone();
        theirs.merge(second.encode_to_vec().as_slice()).unwrap();
        let mut ours = Candidate {
            id: first.id,
            descriptors: first.descriptors,
        };
        ours.merge(second.encode_to_vec().as_slice()).unwrap();
        assert_eq!(ours.id, theirs.id);
        assert_eq!(ours.descriptors, theirs.descriptors);
        let mut cleared = ours.clone();
        cleared.clear();
        assert_eq!(cleared, Candidate::default());
    }
}
