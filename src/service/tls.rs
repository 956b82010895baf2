//! TLS for the server and the clients: PEM files read and checked at
//! start-up (a bad file is an error naming its setting and path, not a
//! handshake failure later), and the subject of a client certificate
//! rendered as text for the audit record.
//!
//! rustls does the handshake and the chain verification (through tonic's
//! `tls-ring` feature); this module only reads what rustls has already
//! verified.

use std::fmt::Write as _;
use std::path::Path;

use rustls_pki_types::pem::PemObject;
use rustls_pki_types::{CertificateDer, PrivateKeyDer};
use tonic::transport::{Certificate, ClientTlsConfig, Identity, ServerTlsConfig};

use super::settings::{Error, TlsSettings};

/// Reads a PEM file that must hold at least one certificate.
pub fn read_certificates(key: &'static str, path: &Path) -> Result<Vec<u8>, Error> {
    let bytes = read(key, path)?;
    let parsed: Result<Vec<CertificateDer<'_>>, _> =
        CertificateDer::pem_slice_iter(&bytes).collect();
    match parsed {
        Ok(certs) if !certs.is_empty() => Ok(bytes),
        Ok(_) => Err(Error::File {
            key,
            path: path.to_path_buf(),
            why: "holds no PEM certificate (expected -----BEGIN CERTIFICATE-----)".into(),
        }),
        Err(e) => Err(Error::File {
            key,
            path: path.to_path_buf(),
            why: format!("is not valid PEM: {e}"),
        }),
    }
}

/// Reads a PEM file that must hold a private key.
pub fn read_private_key(key: &'static str, path: &Path) -> Result<Vec<u8>, Error> {
    let bytes = read(key, path)?;
    PrivateKeyDer::from_pem_slice(&bytes).map_err(|e| Error::File {
        key,
        path: path.to_path_buf(),
        why: format!("holds no usable PEM private key (PKCS#8, PKCS#1 or SEC1 expected): {e}"),
    })?;
    Ok(bytes)
}

fn read(key: &'static str, path: &Path) -> Result<Vec<u8>, Error> {
    std::fs::read(path).map_err(|e| Error::File {
        key,
        path: path.to_path_buf(),
        why: format!("cannot be read: {e}"),
    })
}

/// The server's TLS configuration, or none when `tls.cert` is unset. With
/// `tls.client_ca`, rustls refuses any client without a certificate that CA
/// signed.
pub fn server_config(tls: &TlsSettings) -> Result<Option<ServerTlsConfig>, Error> {
    let (Some(cert), Some(key)) = (&tls.cert, &tls.key) else {
        return Ok(None);
    };
    let identity = Identity::from_pem(
        read_certificates("tls.cert", cert)?,
        read_private_key("tls.key", key)?,
    );
    let mut config = ServerTlsConfig::new().identity(identity);
    if let Some(ca) = &tls.client_ca {
        config = config
            .client_ca_root(Certificate::from_pem(read_certificates(
                "tls.client_ca",
                ca,
            )?))
            .client_auth_optional(false);
    }
    Ok(Some(config))
}

/// What a client needs to reach a TLS server.
#[derive(Clone, Debug, Default)]
pub struct ClientTls<'a> {
    /// CA that signed the server's certificate (PEM).
    pub ca_cert: Option<&'a Path>,
    /// The client's own certificate and key, for servers that ask for one.
    pub client_cert: Option<&'a Path>,
    pub client_key: Option<&'a Path>,
}

/// A client TLS configuration, or none when no CA is given.
pub fn client_config(c: &ClientTls<'_>) -> Result<Option<ClientTlsConfig>, Error> {
    let Some(ca) = c.ca_cert else {
        if c.client_cert.is_some() || c.client_key.is_some() {
            return Err(Error::Invalid {
                key: "--ca-cert",
                value: "(not set)".into(),
                why: "a client certificate is sent only over TLS: give --ca-cert too".into(),
            });
        }
        return Ok(None);
    };
    let mut config = ClientTlsConfig::new()
        .ca_certificate(Certificate::from_pem(read_certificates("--ca-cert", ca)?));
    match (c.client_cert, c.client_key) {
        (Some(cert), Some(key)) => {
            config = config.identity(Identity::from_pem(
                read_certificates("--client-cert", cert)?,
                read_private_key("--client-key", key)?,
            ));
        }
        (None, None) => {}
        _ => {
            return Err(Error::Invalid {
                key: "--client-cert",
                value: "(one of two)".into(),
                why: "--client-cert and --client-key are given together".into(),
            });
        }
    }
    Ok(Some(config))
}

/// The subject of a DER certificate as an RFC 4514 string (last RDN first,
/// e.g. `CN=lab-robot,O=Screening`), or none if the DER is not a
/// certificate. Attribute types without a short name are written as dotted
/// OIDs and values that are not text as `#` and hex, as RFC 4514 §2.3–2.4
/// prescribe.
pub fn subject_of(der: &[u8]) -> Option<String> {
    // Certificate ::= SEQUENCE { tbsCertificate, signatureAlgorithm, signature }
    let (tag, cert, _) = element(der)?;
    if tag != SEQUENCE {
        return None;
    }
    let (tag, tbs, _) = element(cert)?;
    if tag != SEQUENCE {
        return None;
    }
    // tbsCertificate ::= SEQUENCE { [0] version OPTIONAL, serialNumber,
    //   signature, issuer, validity, subject, ... } (RFC 5280 §4.1)
    let mut rest = tbs;
    let (tag, _, after) = element(rest)?;
    if tag == 0xA0 {
        rest = after;
    }
    for _ in 0..4 {
        let (_, _, after) = element(rest)?;
        rest = after;
    }
    let (tag, name, _) = element(rest)?;
    if tag != SEQUENCE {
        return None;
    }
    render_name(name)
}

const SEQUENCE: u8 = 0x30;
const SET: u8 = 0x31;
const OID: u8 = 0x06;

/// One DER element: (tag, contents, what follows). Definite lengths only,
/// as DER requires.
fn element(input: &[u8]) -> Option<(u8, &[u8], &[u8])> {
    let (&tag, rest) = input.split_first()?;
    let (&first, mut rest) = rest.split_first()?;
    let len = if first < 0x80 {
        first as usize
    } else {
        let n = (first & 0x7f) as usize;
        if n == 0 || n > 4 || rest.len() < n {
            return None;
        }
        let (bytes, after) = rest.split_at(n);
        rest = after;
        bytes.iter().fold(0usize, |acc, &b| (acc << 8) | b as usize)
    };
    if rest.len() < len {
        return None;
    }
    let (contents, after) = rest.split_at(len);
    Some((tag, contents, after))
}

/// Name ::= SEQUENCE OF RelativeDistinguishedName (SET OF
/// AttributeTypeAndValue).
fn render_name(mut name: &[u8]) -> Option<String> {
    let mut rdns = Vec::new();
    while !name.is_empty() {
        let (tag, set, after) = element(name)?;
        if tag != SET {
            return None;
        }
        name = after;
        let mut parts = Vec::new();
        let mut set = set;
        while !set.is_empty() {
            let (tag, atv, after) = element(set)?;
            if tag != SEQUENCE {
                return None;
            }
            set = after;
            let (tag, oid, value) = element(atv)?;
            if tag != OID {
                return None;
            }
            let (vtag, vbytes, _) = element(value)?;
            parts.push(format!(
                "{}={}",
                attribute_name(oid)?,
                attribute_value(vtag, value, vbytes)
            ));
        }
        rdns.push(parts.join("+"));
    }
    rdns.reverse();
    Some(rdns.join(","))
}

/// Short names of RFC 4514 §3 (and emailAddress, common practice).
fn attribute_name(oid: &[u8]) -> Option<String> {
    let short = match oid {
        [0x55, 0x04, 0x03] => "CN",
        [0x55, 0x04, 0x07] => "L",
        [0x55, 0x04, 0x08] => "ST",
        [0x55, 0x04, 0x0A] => "O",
        [0x55, 0x04, 0x0B] => "OU",
        [0x55, 0x04, 0x06] => "C",
        [0x55, 0x04, 0x09] => "STREET",
        [0x09, 0x92, 0x26, 0x89, 0x93, 0xF2, 0x2C, 0x64, 0x01, 0x19] => "DC",
        [0x09, 0x92, 0x26, 0x89, 0x93, 0xF2, 0x2C, 0x64, 0x01, 0x01] => "UID",
        [0x2A, 0x86, 0x48, 0x86, 0xF7, 0x0D, 0x01, 0x09, 0x01] => "emailAddress",
        _ => return dotted(oid),
    };
    Some(short.to_string())
}

fn dotted(oid: &[u8]) -> Option<String> {
    let (&first, rest) = oid.split_first()?;
    let mut out = format!("{}.{}", first / 40, first % 40);
    let mut arc: u64 = 0;
    for &b in rest {
        arc = arc.checked_mul(128)? | (b & 0x7f) as u64;
        if b & 0x80 == 0 {
            let _ = write!(out, ".{arc}");
            arc = 0;
        }
    }
    Some(out)
}

/// Text string types as text (escaped per RFC 4514 §2.4); anything else
/// as `#` and the hex of its whole DER encoding.
fn attribute_value(tag: u8, encoded: &[u8], contents: &[u8]) -> String {
    const UTF8: u8 = 0x0C;
    const PRINTABLE: u8 = 0x13;
    const T61: u8 = 0x14;
    const IA5: u8 = 0x16;
    match tag {
        UTF8 | PRINTABLE | T61 | IA5 => escape(&String::from_utf8_lossy(contents)),
        _ => {
            let rest = element(encoded).map_or(&[][..], |(_, _, after)| after);
            let whole = &encoded[..encoded.len() - rest.len()];
            let mut s = String::from("#");
            for b in whole {
                let _ = write!(s, "{b:02x}");
            }
            s
        }
    }
}

fn escape(value: &str) -> String {
    let mut out = String::with_capacity(value.len());
    let last = value.chars().count().saturating_sub(1);
    for (i, c) in value.chars().enumerate() {
        let special = matches!(c, '"' | '+' | ',' | ';' | '<' | '>' | '\\')
            || (i == 0 && (c == '#' || c == ' '))
            || (i == last && c == ' ');
        if special {
            out.push('\\');
        }
        if c == '\0' {
            out.push_str("\\00");
        } else {
            out.push(c);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dotted_oids_decode_base_128_arcs() {
        // 1.2.840.113549 is the RSA arc: 2A 86 48 86 F7 0D (X.690 §8.19
        // worked encoding, from memory).
        assert_eq!(
            dotted(&[0x2A, 0x86, 0x48, 0x86, 0xF7, 0x0D]).as_deref(),
            Some("1.2.840.113549")
        );
    }

    #[test]
    fn special_characters_are_escaped() {
        assert_eq!(escape("a,b+c"), "a\\,b\\+c");
        assert_eq!(escape("#x "), "\\#x\\ ");
        assert_eq!(escape("plain"), "plain");
    }

    #[test]
    fn truncated_der_is_not_a_certificate() {
        assert_eq!(subject_of(&[]), None);
        assert_eq!(subject_of(&[0x30, 0x82, 0x01]), None);
        assert_eq!(subject_of(&[0x30, 0x03, 0x02, 0x01, 0x00]), None);
    }
}
