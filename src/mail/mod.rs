//! Mail: composing the morning summary (multipart: plain text, HTML with inline images by
//! Content-ID, CSV attachment) and alerts, and sending one message over SMTP (STARTTLS,
//! implicit TLS, or plain on a trusted network). The only module that speaks SMTP; the
//! outbox that keeps messages until a server took them is `outbox`. A password is read
//! from a file or the environment and never logged.

use std::time::Duration;

use lettre::message::header::ContentType;
use lettre::message::{Attachment, Mailbox, MultiPart, SinglePart};
use lettre::transport::smtp::authentication::Credentials;
use lettre::transport::smtp::client::{Certificate, Tls, TlsParameters};
use lettre::{Address, Message, SmtpTransport, Transport};

use crate::config::Config;
pub use crate::config::Security;

#[derive(Debug, thiserror::Error)]
pub enum MailError {
    #[error("mail settings: {0}")]
    Settings(String),
    #[error("composing the message: {0}")]
    Compose(String),
    #[error("sending to {host}:{port}: {reason}")]
    Send {
        host: String,
        port: u16,
        reason: String,
    },
}

/// Everything needed to deliver, from the configuration.
#[derive(Clone)]
pub struct MailSettings {
    /// None: no server; messages are written as .eml files instead.
    pub host: Option<String>,
    pub port: u16,
    pub security: Security,
    pub username: Option<String>,
    password: Option<String>,
    /// An extra certificate authority to trust, PEM.
    ca_pem: Option<Vec<u8>>,
    pub from: Mailbox,
    pub to: Vec<Mailbox>,
}

impl std::fmt::Debug for MailSettings {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        // The password is never printed.
        f.debug_struct("MailSettings")
            .field("host", &self.host)
            .field("port", &self.port)
            .field("security", &self.security)
            .field("username", &self.username)
            .field("from", &self.from)
            .field("to", &self.to)
            .finish_non_exhaustive()
    }
}

impl MailSettings {
    pub fn from_config(c: &Config) -> Result<Self, MailError> {
        let m = &c.mail;
        let security = m.security;
        let port = m.smtp_port.unwrap_or(match security {
            Security::StartTls => 587,
            Security::Tls => 465,
            Security::None => 25,
        });
        let password = match &m.password_file {
            Some(p) => {
                // The same rule as check-config: this user's, and nobody else's to read.
                crate::os::check_private_file(p)
                    .map_err(|e| MailError::Settings(format!("password_file {e}")))?;
                Some(
                    std::fs::read_to_string(p)
                        .map_err(|e| {
                            MailError::Settings(format!("password_file {}: {e}", p.display()))
                        })?
                        .trim_end_matches(['\n', '\r'])
                        .to_string(),
                )
            }
            None => std::env::var("SUBWATCH_SMTP_PASSWORD").ok(),
        };
        if password.is_some() && security == Security::None && !m.send_password_unencrypted {
            return Err(MailError::Settings(
                "security = \"none\" would send the password unencrypted (set send_password_unencrypted = true to allow it)".into(),
            ));
        }
        let from: Mailbox = match &m.from {
            Some(f) => f.clone(),
            None => "subwatch@localhost"
                .parse()
                .map_err(|e| MailError::Settings(format!("from: {e}")))?,
        };
        let to = m.to.clone();
        let ca_pem = match &m.ca_file {
            Some(p) => Some(
                std::fs::read(p)
                    .map_err(|e| MailError::Settings(format!("ca_file {}: {e}", p.display())))?,
            ),
            None => None,
        };
        Ok(MailSettings {
            host: m.smtp_host.clone(),
            port,
            security,
            username: m.username.clone(),
            password,
            ca_pem,
            from,
            to,
        })
    }

    fn transport(&self, host: &str) -> Result<SmtpTransport, MailError> {
        let fail = |e: lettre::transport::smtp::Error| MailError::Send {
            host: host.to_string(),
            port: self.port,
            reason: e.to_string(),
        };
        let mut b = match (self.security, &self.ca_pem) {
            (Security::None, _) => SmtpTransport::builder_dangerous(host),
            // The usual roots plus the configured authority; the server's certificate
            // is still checked against its name.
            (security, Some(pem)) => {
                let params = TlsParameters::builder(host.to_string())
                    .add_root_certificate(Certificate::from_pem(pem).map_err(fail)?)
                    .build_rustls()
                    .map_err(fail)?;
                SmtpTransport::builder_dangerous(host).tls(if security == Security::Tls {
                    Tls::Wrapper(params)
                } else {
                    Tls::Required(params)
                })
            }
            (Security::StartTls, None) => SmtpTransport::starttls_relay(host).map_err(fail)?,
            (Security::Tls, None) => SmtpTransport::relay(host).map_err(fail)?,
        };
        b = b.port(self.port).timeout(Some(Duration::from_secs(30)));
        if let (Some(u), Some(p)) = (&self.username, &self.password) {
            b = b.credentials(Credentials::new(u.clone(), p.clone()));
        }
        Ok(b.build())
    }
}

/// A composed message: its bytes (RFC 5322) and the envelope addresses.
#[derive(Debug, Clone)]
pub struct Composed {
    pub subject: String,
    pub from: String,
    pub to: Vec<String>,
    pub bytes: Vec<u8>,
}

/// An image shown inside the HTML part, referenced there as `cid:<id>`.
pub struct Inline {
    pub content_id: String,
    pub png: Vec<u8>,
}

/// A file attached to a message as it is (a VOEvent document).
#[derive(Debug, Clone)]
pub struct Attached {
    pub name: String,
    pub content_type: String,
    pub bytes: Vec<u8>,
}

/// Compose the summary mail: the text and HTML parts (images inline by Content-ID), then
/// the files (the night's CSV, VOEvent documents). The subject must already be one line.
pub fn compose(
    s: &MailSettings,
    subject: &str,
    text: &str,
    html: &str,
    inline: &[Inline],
    files: &[Attached],
) -> Result<Composed, MailError> {
    let png = ContentType::parse("image/png").map_err(|e| MailError::Compose(e.to_string()))?;
    let mut related = MultiPart::related().singlepart(SinglePart::html(html.to_string()));
    for i in inline {
        related = related.singlepart(
            Attachment::new_inline(i.content_id.clone()).body(i.png.clone(), png.clone()),
        );
    }
    let mut body = MultiPart::mixed().multipart(
        MultiPart::alternative()
            .singlepart(SinglePart::plain(text.to_string()))
            .multipart(related),
    );
    for f in files {
        let kind = ContentType::parse(&f.content_type)
            .map_err(|e| MailError::Compose(format!("{}: {e}", f.name)))?;
        // Text stays text (quoted-printable where needed); anything else as it is.
        body = match std::str::from_utf8(&f.bytes) {
            Ok(text) => {
                body.singlepart(Attachment::new(f.name.clone()).body(text.to_string(), kind))
            }
            Err(_) => body.singlepart(Attachment::new(f.name.clone()).body(f.bytes.clone(), kind)),
        };
    }
    finish(s, subject, body)
}

/// Address a message body to the configured recipients and format it.
fn finish(s: &MailSettings, subject: &str, body: MultiPart) -> Result<Composed, MailError> {
    if s.to.is_empty() {
        return Err(MailError::Settings(
            "no recipients (mail.to is empty)".into(),
        ));
    }
    let mut builder = Message::builder()
        .from(s.from.clone())
        .subject(crate::text::single_line(subject));
    for t in &s.to {
        builder = builder.to(t.clone());
    }
    let msg = builder
        .multipart(body)
        .map_err(|e| MailError::Compose(e.to_string()))?;
    Ok(Composed {
        subject: subject.to_string(),
        from: s.from.email.to_string(),
        to: s.to.iter().map(|m| m.email.to_string()).collect(),
        bytes: msg.formatted(),
    })
}

/// A short mail: a live alert or a test message (plain text and a small HTML part).
pub fn compose_note(s: &MailSettings, subject: &str, text: &str) -> Result<Composed, MailError> {
    let html = format!(
        "<!DOCTYPE html><html><body><p>{}</p></body></html>",
        crate::text::escape_html(text)
    );
    finish(
        s,
        subject,
        MultiPart::alternative_plain_html(text.to_string(), html),
    )
}

/// Deliver already-formatted bytes to the server.
pub fn send_raw(
    s: &MailSettings,
    from: &str,
    to: &[String],
    bytes: &[u8],
) -> Result<(), MailError> {
    let host = s
        .host
        .as_deref()
        .ok_or_else(|| MailError::Settings("no smtp_host".into()))?;
    let parse = |a: &str| {
        a.parse::<Address>()
            .map_err(|e| MailError::Compose(format!("{a}: {e}")))
    };
    let envelope = lettre::address::Envelope::new(
        Some(parse(from)?),
        to.iter().map(|t| parse(t)).collect::<Result<_, _>>()?,
    )
    .map_err(|e| MailError::Compose(e.to_string()))?;
    s.transport(host)?
        .send_raw(&envelope, bytes)
        .map(|_| ())
        .map_err(|e| MailError::Send {
            host: host.to_string(),
            port: s.port,
            reason: e.to_string(),
        })
}
