//! Sending: a rendered message, addressed, leaves through a [`Mailer`].
//!
//! - [`Smtp`]: lettre's blocking SMTP transport over rustls, with plain,
//!   STARTTLS or implicit TLS, optional AUTH, and an extra trusted root
//!   certificate for private CAs and self-signed test servers.
//! - [`OutboxDir`]: writes each message as an RFC 5322 `.eml` file, named
//!   after its Message-ID, atomically (temporary file, fsync, rename, fsync
//!   of the folder). Sending the same message again replaces the file with
//!   the same bytes, so a folder never holds a message twice.
//! - [`Recording`]: keeps messages in memory, for tests and the demo; it can
//!   be told to fail the next sends.
//!
//! Every failure is a [`SendError`] that says whether trying again later can
//! help ([`SendError::is_transient`]): a refused or timed-out connection or a
//! 4xx reply can; a 5xx reply, a bad address or a TLS problem cannot.
//!
//! **Invariant:** send never formats content. It assembles the rendered parts
//! into MIME (text, then HTML with the chart as a related inline part), adds
//! From, To and the caller's Date, and delivers. SMTP blocks: call it from
//! `spawn_blocking` or a thread of its own.
//!
//! **Invariant:** passwords live in a [`Secret`], whose `Debug` and `Display`
//! print `***`; no error or log line here contains one.

use std::collections::VecDeque;
use std::fmt;
use std::fs;
use std::io::{self, Write as _};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Mutex, PoisonError};
use std::time::{Duration, SystemTime};

use lettre::message::header::{ContentType, Header, HeaderName, HeaderValue};
use lettre::message::{Attachment, Mailbox, MultiPart, SinglePart};
use lettre::transport::smtp::authentication::Credentials;
use lettre::transport::smtp::client::{Certificate, Tls, TlsParameters};
use lettre::{Message, SmtpTransport, Transport as _};

use super::render::{self, Rendered};
use super::text::{self, header_safe};

/// A rendered message with its envelope: who it is from, who gets it, and
/// the Date header (passed in; nothing here reads the clock).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Outgoing {
    /// The From mailbox, e.g. `slopewarden <alerts@lab-north.example.net>`.
    pub from: String,
    /// The To mailboxes; at least one.
    pub to: Vec<String>,
    /// The Date header.
    pub date: SystemTime,
    /// The message itself.
    pub rendered: Rendered,
}

/// Something that delivers messages.
///
/// `Send + Sync` so one mailer can be shared by the sender task and tests.
pub trait Mailer: Send + Sync {
    /// Delivers one message, or says why not and whether to retry.
    fn send(&self, msg: &Outgoing) -> Result<(), SendError>;

    /// Where messages go, for people, e.g. `SMTP server mail.example.net:587
    /// (STARTTLS)`. Never includes credentials.
    fn describe(&self) -> String {
        "a mailer".to_string()
    }
}

/// Why a message was not delivered.
#[derive(Debug, thiserror::Error)]
pub enum SendError {
    /// The server could not be reached (refused, reset, no route, name not
    /// resolved). Transient.
    #[error("could not reach the mail server {server}: {reason}; the message will be retried")]
    Unreachable {
        /// `host:port`.
        server: String,
        /// What the network said.
        reason: String,
    },
    /// The server did not answer in time. Transient.
    #[error(
        "the mail server {server} did not answer within {} s; the message will be retried",
        timeout.as_secs_f64()
    )]
    TimedOut {
        /// `host:port`.
        server: String,
        /// The configured timeout.
        timeout: Duration,
    },
    /// The server answered 4xx: try again later. Transient.
    #[error("the mail server {server} deferred the message ({code}): {reason}; it will be retried")]
    Deferred {
        /// `host:port`.
        server: String,
        /// The SMTP reply code, e.g. `451`.
        code: String,
        /// The server's text.
        reason: String,
    },
    /// The server refused the login (534, 535, 538). Permanent until the
    /// settings change.
    #[error(
        "the mail server {server} refused the login ({code}): {reason}; check the SMTP username and the password's environment variable or file"
    )]
    AuthRejected {
        /// `host:port`.
        server: String,
        /// The SMTP reply code.
        code: String,
        /// The server's text.
        reason: String,
    },
    /// The server answered 5xx to the message or a recipient. Permanent.
    #[error("the mail server {server} rejected the message ({code}): {reason}")]
    Rejected {
        /// `host:port`.
        server: String,
        /// The SMTP reply code, e.g. `550`.
        code: String,
        /// The server's text.
        reason: String,
    },
    /// The client and server cannot work together as configured (no common
    /// AUTH mechanism, STARTTLS not offered, 8-bit text refused). Permanent.
    #[error("the mail server {server} cannot take this message as configured: {reason}")]
    Incompatible {
        /// `host:port`.
        server: String,
        /// What did not match.
        reason: String,
    },
    /// The server broke the SMTP protocol (an unparsable reply). Transient:
    /// a restarting server can do this.
    #[error(
        "the mail server {server} sent a reply that is not SMTP: {reason}; the message will be retried"
    )]
    Protocol {
        /// `host:port`.
        server: String,
        /// What was wrong.
        reason: String,
    },
    /// A From or To address is not a valid mailbox. Permanent.
    #[error("{field} address `{value}` is not usable: {reason}")]
    BadAddress {
        /// `From` or `To`.
        field: &'static str,
        /// The address as given (made safe to print).
        value: String,
        /// Why not.
        reason: String,
    },
    /// TLS could not be set up: an unreadable or invalid CA file, a server
    /// certificate that is not trusted or not for this host, a server that
    /// does not speak TLS where it was expected. Permanent.
    #[error("TLS with the mail server {server} failed: {reason}")]
    Tls {
        /// `host:port`.
        server: String,
        /// What failed.
        reason: String,
    },
    /// The SMTP settings are unusable as given. Permanent.
    #[error("SMTP settings: {0}")]
    Config(String),
    /// The rendered parts could not be assembled into a message. Permanent.
    #[error("could not assemble the message: {0}")]
    Build(String),
    /// Writing into the outbox folder failed. Transient: a full or
    /// read-only disk is fixed outside the program, and the message waits.
    #[error("could not write the message file {path}: {source}")]
    Outbox {
        /// The file or folder involved.
        path: PathBuf,
        /// The I/O error.
        #[source]
        source: io::Error,
    },
}

impl SendError {
    /// True when trying again later may succeed: the message stays queued.
    pub fn is_transient(&self) -> bool {
        matches!(
            self,
            SendError::Unreachable { .. }
                | SendError::TimedOut { .. }
                | SendError::Deferred { .. }
                | SendError::Protocol { .. }
                | SendError::Outbox { .. }
        )
    }

    /// True when retrying cannot help until something is changed by a person.
    pub fn is_permanent(&self) -> bool {
        !self.is_transient()
    }
}

/// A password or other credential. `Debug` and `Display` print `***`, so it
/// cannot leak through a log line or an error message by accident.
#[derive(Clone, PartialEq, Eq)]
pub struct Secret(String);

/// Why a [`Secret`] could not be loaded. Names the variable or the file,
/// never the value.
#[derive(Debug, thiserror::Error)]
pub enum SecretError {
    /// The environment variable is not set.
    #[error("environment variable {name} is not set; export it with the password")]
    EnvMissing {
        /// The variable's name.
        name: String,
    },
    /// The environment variable is not valid UTF-8.
    #[error("environment variable {name} does not hold valid UTF-8")]
    EnvNotUnicode {
        /// The variable's name.
        name: String,
    },
    /// The environment variable is set but empty.
    #[error("environment variable {name} is empty")]
    EnvEmpty {
        /// The variable's name.
        name: String,
    },
    /// The file could not be read.
    #[error("cannot read the password file {}: {source}", path.display())]
    FileRead {
        /// The file.
        path: PathBuf,
        /// The I/O error (which never contains the file's contents).
        #[source]
        source: io::Error,
    },
    /// The file is not valid UTF-8.
    #[error("the password file {} does not hold valid UTF-8", path.display())]
    FileNotUnicode {
        /// The file.
        path: PathBuf,
    },
    /// The file is empty (or holds only a line break).
    #[error("the password file {} is empty", path.display())]
    FileEmpty {
        /// The file.
        path: PathBuf,
    },
}

impl Secret {
    /// Wraps a value.
    pub fn new(value: impl Into<String>) -> Secret {
        Secret(value.into())
    }

    /// Reads the value of environment variable `name`; an unset or empty
    /// variable is an error.
    pub fn from_env(name: &str) -> Result<Secret, SecretError> {
        match std::env::var(name) {
            Ok(v) if v.is_empty() => Err(SecretError::EnvEmpty { name: name.into() }),
            Ok(v) => Ok(Secret(v)),
            Err(std::env::VarError::NotPresent) => {
                Err(SecretError::EnvMissing { name: name.into() })
            }
            // The variant carries the raw value: drop it unseen.
            Err(std::env::VarError::NotUnicode(_)) => {
                Err(SecretError::EnvNotUnicode { name: name.into() })
            }
        }
    }

    /// Reads the whole file at `path`, without the line break(s) at its end
    /// that editors and `echo` add. An empty result is an error.
    pub fn from_file(path: &Path) -> Result<Secret, SecretError> {
        let bytes = fs::read(path).map_err(|source| SecretError::FileRead {
            path: path.to_path_buf(),
            source,
        })?;
        let mut value = String::from_utf8(bytes).map_err(|_| SecretError::FileNotUnicode {
            path: path.to_path_buf(),
        })?;
        let kept = value.trim_end_matches(['\n', '\r']).len();
        value.truncate(kept);
        if value.is_empty() {
            return Err(SecretError::FileEmpty {
                path: path.to_path_buf(),
            });
        }
        Ok(Secret(value))
    }

    /// The value, for handing to the transport. Do not log it.
    pub fn expose(&self) -> &str {
        &self.0
    }
}

impl fmt::Debug for Secret {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("***")
    }
}

impl fmt::Display for Secret {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("***")
    }
}

/// How the SMTP connection is protected.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TlsMode {
    /// No TLS at all. Only for a relay on the same host; credentials are
    /// refused in this mode.
    None,
    /// Plain connection upgraded with STARTTLS, which is required (usually
    /// port 587).
    StartTls,
    /// TLS from the first byte (usually port 465).
    Implicit,
}

impl TlsMode {
    /// The usual port for this mode: 25, 587 or 465.
    pub fn default_port(self) -> u16 {
        match self {
            TlsMode::None => 25,
            TlsMode::StartTls => 587,
            TlsMode::Implicit => 465,
        }
    }

    fn describe(self) -> &'static str {
        match self {
            TlsMode::None => "no TLS",
            TlsMode::StartTls => "STARTTLS",
            TlsMode::Implicit => "implicit TLS",
        }
    }
}

/// Where and how to reach the SMTP server.
#[derive(Debug, Clone)]
pub struct SmtpSettings {
    /// Host name (also the name the server certificate must carry) or IP.
    pub host: String,
    /// TCP port.
    pub port: u16,
    /// Transport protection.
    pub tls: TlsMode,
    /// Login name, when the server wants AUTH.
    pub username: Option<String>,
    /// Password, when the server wants AUTH.
    pub password: Option<Secret>,
    /// An extra trusted root certificate (PEM), added to the system's roots:
    /// for a private CA or a self-signed test server.
    pub ca_file: Option<PathBuf>,
    /// Connect and per-reply timeout.
    pub timeout: Duration,
}

impl SmtpSettings {
    /// Settings for `host` with the mode's usual port, no login, no extra
    /// root and a 30-second timeout.
    pub fn new(host: impl Into<String>, tls: TlsMode) -> SmtpSettings {
        SmtpSettings {
            host: host.into(),
            port: tls.default_port(),
            tls,
            username: None,
            password: None,
            ca_file: None,
            timeout: Duration::from_secs(30),
        }
    }
}

/// Delivers through an SMTP server.
pub struct Smtp {
    transport: SmtpTransport,
    server: String,
    tls: TlsMode,
    timeout: Duration,
}

impl fmt::Debug for Smtp {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Smtp")
            .field("server", &self.server)
            .field("tls", &self.tls)
            .finish_non_exhaustive()
    }
}

impl Smtp {
    /// Checks the settings and prepares the transport; connects only when
    /// sending. Reads `ca_file` now, so a bad file shows at startup.
    pub fn new(settings: &SmtpSettings) -> Result<Smtp, SendError> {
        let host = settings.host.trim();
        if host.is_empty() {
            return Err(SendError::Config("the SMTP host is empty".into()));
        }
        if host.chars().any(|c| c.is_control() || c.is_whitespace()) {
            return Err(SendError::Config(format!(
                "the SMTP host `{}` contains spaces or control characters",
                text::inline(host, 100)
            )));
        }
        if settings.port == 0 {
            return Err(SendError::Config("the SMTP port is 0".into()));
        }
        let server = format!("{host}:{}", settings.port);
        let mut builder = SmtpTransport::builder_dangerous(host)
            .port(settings.port)
            .timeout(Some(settings.timeout));
        builder = match settings.tls {
            TlsMode::None => builder.tls(Tls::None),
            TlsMode::StartTls => builder.tls(Tls::Required(tls_parameters(settings, &server)?)),
            TlsMode::Implicit => builder.tls(Tls::Wrapper(tls_parameters(settings, &server)?)),
        };
        match (&settings.username, &settings.password) {
            (Some(user), Some(password)) => {
                if settings.tls == TlsMode::None {
                    return Err(SendError::Config(format!(
                        "refusing to send the SMTP password to {server} without TLS; set the TLS mode to starttls or implicit"
                    )));
                }
                builder = builder.credentials(Credentials::new(
                    user.clone(),
                    password.expose().to_string(),
                ));
            }
            (Some(_), None) => {
                return Err(SendError::Config(
                    "an SMTP username is set but no password; name one with password_env or password_file".into(),
                ));
            }
            (None, Some(_)) => {
                return Err(SendError::Config(
                    "an SMTP password is set but no username".into(),
                ));
            }
            (None, None) => {}
        }
        Ok(Smtp {
            transport: builder.build(),
            server,
            tls: settings.tls,
            timeout: settings.timeout,
        })
    }
}

fn tls_parameters(settings: &SmtpSettings, server: &str) -> Result<TlsParameters, SendError> {
    let tls_error = |reason: String| SendError::Tls {
        server: server.to_string(),
        reason,
    };
    let mut builder = TlsParameters::builder(settings.host.trim().to_string());
    if let Some(path) = &settings.ca_file {
        let pem = fs::read(path)
            .map_err(|e| tls_error(format!("cannot read the CA file {}: {e}", path.display())))?;
        if !pem
            .windows(b"-----BEGIN CERTIFICATE-----".len())
            .any(|w| w == b"-----BEGIN CERTIFICATE-----")
        {
            return Err(tls_error(format!(
                "the CA file {} holds no PEM certificate (-----BEGIN CERTIFICATE-----)",
                path.display()
            )));
        }
        let cert = Certificate::from_pem(&pem).map_err(|e| {
            tls_error(format!(
                "the CA file {} is not valid PEM: {e}",
                path.display()
            ))
        })?;
        builder = builder.add_root_certificate(cert);
    }
    builder
        .build_rustls()
        .map_err(|e| tls_error(format!("TLS settings rejected: {e}")))
}

/// The first I/O error in an error's chain, if any.
fn io_cause<'a>(err: &'a (dyn std::error::Error + 'static)) -> Option<&'a io::Error> {
    let mut current = Some(err);
    while let Some(e) = current {
        if let Some(io_err) = e.downcast_ref::<io::Error>() {
            return Some(io_err);
        }
        current = e.source();
    }
    None
}

/// Sorts a lettre error into retry-later or give-up.
fn classify(err: &lettre::transport::smtp::Error, server: &str, timeout: Duration) -> SendError {
    let server = server.to_string();
    let detail = || {
        std::error::Error::source(err)
            .map(|s| text::inline(&s.to_string(), 300))
            .unwrap_or_else(|| text::inline(&err.to_string(), 300))
    };
    if let Some(code) = err.status() {
        let code = code.to_string();
        let reason = detail();
        return if err.is_transient() {
            SendError::Deferred {
                server,
                code,
                reason,
            }
        } else if matches!(code.as_str(), "534" | "535" | "538") {
            SendError::AuthRejected {
                server,
                code,
                reason,
            }
        } else {
            SendError::Rejected {
                server,
                code,
                reason,
            }
        };
    }
    if err.is_timeout() {
        return SendError::TimedOut { server, timeout };
    }
    if err.is_tls() {
        return SendError::Tls {
            server,
            reason: detail(),
        };
    }
    if err.is_client() {
        return SendError::Incompatible {
            server,
            reason: detail(),
        };
    }
    if err.is_response() {
        return SendError::Protocol {
            server,
            reason: detail(),
        };
    }
    match io_cause(err) {
        // A read timeout on a socket surfaces as WouldBlock on Unix.
        Some(e)
            if matches!(
                e.kind(),
                io::ErrorKind::TimedOut | io::ErrorKind::WouldBlock
            ) =>
        {
            SendError::TimedOut { server, timeout }
        }
        // rustls reports handshake and certificate failures as InvalidData:
        // an untrusted certificate, a name mismatch, or plain text where TLS
        // was expected. Retrying cannot fix any of these.
        Some(e) if e.kind() == io::ErrorKind::InvalidData => SendError::Tls {
            server,
            reason: text::inline(&e.to_string(), 300),
        },
        _ => SendError::Unreachable {
            server,
            reason: detail(),
        },
    }
}

impl Mailer for Smtp {
    fn send(&self, msg: &Outgoing) -> Result<(), SendError> {
        let message = to_message(msg)?;
        tracing::debug!(
            message_id = %msg.rendered.message_id,
            server = %self.server,
            "sending message over SMTP"
        );
        self.transport
            .send(&message)
            .map(|_| ())
            .map_err(|e| classify(&e, &self.server, self.timeout))
    }

    fn describe(&self) -> String {
        format!("SMTP server {} ({})", self.server, self.tls.describe())
    }
}

/// `Auto-Submitted: auto-generated` (RFC 3834), so that vacation responders
/// and ticket systems do not answer the daemon.
#[derive(Clone)]
struct AutoSubmitted;

impl Header for AutoSubmitted {
    fn name() -> HeaderName {
        HeaderName::new_from_ascii_str("Auto-Submitted")
    }

    fn parse(_s: &str) -> Result<Self, Box<dyn std::error::Error + Send + Sync>> {
        Ok(AutoSubmitted)
    }

    fn display(&self) -> HeaderValue {
        HeaderValue::new(Self::name(), "auto-generated".to_string())
    }
}

fn parse_mailbox(field: &'static str, value: &str) -> Result<Mailbox, SendError> {
    value
        .trim()
        .parse::<Mailbox>()
        .map_err(|e| SendError::BadAddress {
            field,
            value: text::inline(value, 200),
            reason: e.to_string(),
        })
}

/// True for an id made only of characters that are safe inside `<...>` in a
/// header: letters, digits and `. @ _ + = -`.
fn is_plain_id(id: &str) -> bool {
    !id.is_empty()
        && id.len() <= 250
        && id
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '.' | '@' | '_' | '+' | '=' | '-'))
}

/// Assembles the lettre message: headers, then `multipart/alternative` with
/// the text part first and the HTML part (wrapped with the chart in
/// `multipart/related` when there is a chart).
pub fn to_message(out: &Outgoing) -> Result<Message, SendError> {
    let r = &out.rendered;
    let id_inner = r
        .message_id
        .strip_prefix('<')
        .and_then(|s| s.strip_suffix('>'))
        .unwrap_or("");
    if !is_plain_id(id_inner) {
        return Err(SendError::Build(format!(
            "Message-ID `{}` is not of the form <local@domain>",
            text::inline(&r.message_id, 100)
        )));
    }
    if out.to.is_empty() {
        return Err(SendError::BadAddress {
            field: "To",
            value: String::new(),
            reason: "no recipient given".into(),
        });
    }
    let mut builder = Message::builder()
        .from(parse_mailbox("From", &out.from)?)
        .subject(header_safe(&r.subject, text::HEADER_MAX_CHARS))
        .date(out.date)
        .message_id(Some(r.message_id.clone()))
        .header(AutoSubmitted);
    for to in &out.to {
        builder = builder.to(parse_mailbox("To", to)?);
    }
    // Boundaries derived from the Message-ID instead of random ones, so the
    // same message always serializes to the same bytes. "=_" cannot occur in
    // quoted-printable or base64 content, so the boundary cannot either.
    let tag = text::short_hash(&["mime-boundary", &r.message_id]);
    let alternative = MultiPart::alternative().boundary(format!("=_slopewarden.alt.{tag}"));
    let related = MultiPart::related().boundary(format!("=_slopewarden.rel.{tag}"));
    let text_part = SinglePart::plain(r.text.clone());
    let html_part = SinglePart::html(r.html.clone());
    let body = match &r.chart {
        Some(img) => {
            if !is_plain_id(&img.content_id) {
                return Err(SendError::Build(format!(
                    "chart Content-ID `{}` has characters not allowed in a header",
                    text::inline(&img.content_id, 100)
                )));
            }
            let png = ContentType::parse("image/png")
                .map_err(|e| SendError::Build(format!("image/png content type: {e}")))?;
            let chart =
                Attachment::new_inline_with_name(img.content_id.clone(), "chart.png".to_string())
                    .body(img.png.clone(), png);
            alternative
                .singlepart(text_part)
                .multipart(related.singlepart(html_part).singlepart(chart))
        }
        None => alternative.singlepart(text_part).singlepart(html_part),
    };
    builder
        .multipart(body)
        .map_err(|e| SendError::Build(e.to_string()))
}

/// The message as RFC 5322 bytes, exactly as [`Smtp`] would transmit it.
/// The same [`Outgoing`] always gives the same bytes.
pub fn to_rfc5322(out: &Outgoing) -> Result<Vec<u8>, SendError> {
    Ok(to_message(out)?.formatted())
}

/// Writes messages as `.eml` files into a folder.
#[derive(Debug)]
pub struct OutboxDir {
    dir: PathBuf,
    /// Distinguishes this instance's temporary files from each other.
    counter: AtomicU64,
}

impl OutboxDir {
    /// A mailer writing into `dir`, created on the first send if missing.
    pub fn new(dir: impl Into<PathBuf>) -> OutboxDir {
        OutboxDir {
            dir: dir.into(),
            counter: AtomicU64::new(0),
        }
    }

    /// The folder.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Where the message with this Message-ID is (or would be) written:
    /// the id without angle brackets, every character other than letters,
    /// digits and `. @ _ + -` replaced by `_`, no leading dot, at most 150
    /// characters, then `.eml`.
    pub fn path_for(&self, message_id: &str) -> PathBuf {
        self.dir.join(format!("{}.eml", file_stem(message_id)))
    }

    fn write_atomically(&self, path: &Path, bytes: &[u8]) -> Result<(), SendError> {
        let outbox_err = |path: &Path| {
            let path = path.to_path_buf();
            move |source| SendError::Outbox { path, source }
        };
        fs::create_dir_all(&self.dir).map_err(outbox_err(&self.dir))?;
        let stem = path
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default();
        let (tmp, mut file) = loop {
            let n = self.counter.fetch_add(1, Ordering::Relaxed);
            let tmp = self
                .dir
                .join(format!(".{stem}.{}.{n}.tmp", std::process::id()));
            match fs::OpenOptions::new()
                .write(true)
                .create_new(true)
                .open(&tmp)
            {
                Ok(f) => break (tmp, f),
                Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
                Err(e) => return Err(outbox_err(&tmp)(e)),
            }
        };
        let written = file
            .write_all(bytes)
            .and_then(|()| file.sync_all())
            .and_then(|()| fs::rename(&tmp, path));
        drop(file);
        if let Err(e) = written {
            if let Err(cleanup) = fs::remove_file(&tmp) {
                tracing::warn!(path = %tmp.display(), error = %cleanup, "could not remove a temporary outbox file");
            }
            return Err(outbox_err(path)(e));
        }
        // The rename is durable only once the folder itself is synced.
        fs::File::open(&self.dir)
            .and_then(|d| d.sync_all())
            .map_err(outbox_err(&self.dir))
    }
}

fn file_stem(message_id: &str) -> String {
    let bare = message_id
        .trim()
        .trim_start_matches('<')
        .trim_end_matches('>');
    let mut stem: String = bare
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || matches!(c, '.' | '@' | '_' | '+' | '-') {
                c
            } else {
                '_'
            }
        })
        .take(150)
        .collect();
    if stem.starts_with('.') {
        stem.replace_range(0..1, "_");
    }
    if stem.is_empty() {
        stem.push_str("message");
    }
    stem
}

impl Mailer for OutboxDir {
    fn send(&self, msg: &Outgoing) -> Result<(), SendError> {
        let bytes = to_rfc5322(msg)?;
        let path = self.path_for(&msg.rendered.message_id);
        self.write_atomically(&path, &bytes)?;
        tracing::debug!(message_id = %msg.rendered.message_id, path = %path.display(), "message written to the outbox folder");
        Ok(())
    }

    fn describe(&self) -> String {
        format!("outbox folder {}", self.dir.display())
    }
}

/// Keeps sent messages in memory. For tests and the demo.
#[derive(Debug, Default)]
pub struct Recording {
    sent: Mutex<Vec<Outgoing>>,
    failures: Mutex<VecDeque<SendError>>,
}

impl Recording {
    /// An empty recorder.
    pub fn new() -> Recording {
        Recording::default()
    }

    /// Makes the next send fail with `err` (queued: several calls fail that
    /// many sends, in order).
    pub fn fail_next(&self, err: SendError) {
        self.failures
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .push_back(err);
    }

    /// Copies of the messages sent so far, in order.
    pub fn sent(&self) -> Vec<Outgoing> {
        self.sent
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .clone()
    }

    /// How many messages were sent.
    pub fn count(&self) -> usize {
        self.sent
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .len()
    }

    /// Removes and returns the messages sent so far.
    pub fn take(&self) -> Vec<Outgoing> {
        std::mem::take(&mut *self.sent.lock().unwrap_or_else(PoisonError::into_inner))
    }
}

impl Mailer for Recording {
    fn send(&self, msg: &Outgoing) -> Result<(), SendError> {
        let queued = self
            .failures
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .pop_front();
        if let Some(err) = queued {
            return Err(err);
        }
        // Assemble it as the real mailers would, so a bad address fails here
        // too.
        to_message(msg)?;
        self.sent
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .push(msg.clone());
        Ok(())
    }

    fn describe(&self) -> String {
        "in-memory recorder".to_string()
    }
}

/// What `send_test_email` did.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TestEmailReport {
    /// The test message's Message-ID.
    pub message_id: String,
    /// Its subject.
    pub subject: String,
    /// The recipients.
    pub to: Vec<String>,
    /// The mailer's description.
    pub via: String,
}

impl fmt::Display for TestEmailReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "test message {} sent to {} through {}",
            self.message_id,
            self.to.join(", "),
            self.via
        )
    }
}

/// Sends the short test message (see [`render::render_test_message`])
/// through `mailer`, dated `now`. For `slopewarden send-test-email`.
pub fn send_test_email<M: Mailer + ?Sized>(
    mailer: &M,
    from: &str,
    to: &[String],
    instance: &str,
    now: SystemTime,
) -> Result<TestEmailReport, SendError> {
    let rendered = render::render_test_message(instance, &crate::clock::rfc3339(now));
    let out = Outgoing {
        from: from.to_string(),
        to: to.to_vec(),
        date: now,
        rendered,
    };
    mailer.send(&out)?;
    Ok(TestEmailReport {
        message_id: out.rendered.message_id,
        subject: out.rendered.subject,
        to: out.to,
        via: mailer.describe(),
    })
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use crate::messages::render::render_test_message;

    fn outgoing() -> Outgoing {
        Outgoing {
            from: "slopewarden <alerts@lab-north.example.net>".into(),
            to: vec!["analyst@lab-north.example.net".into()],
            date: SystemTime::UNIX_EPOCH + Duration::from_secs(1_950_000_000),
            rendered: render_test_message("lab-north.example.net", "2031-10-17T09:20:00Z"),
        }
    }

    #[test]
    fn secret_never_prints_its_value() {
        let s = Secret::new("hunter2-correct-horse");
        assert_eq!(format!("{s}"), "***");
        assert_eq!(format!("{s:?}"), "***");
        let settings = SmtpSettings {
            password: Some(s),
            username: Some("ops".into()),
            ..SmtpSettings::new("mail.example.net", TlsMode::StartTls)
        };
        assert!(!format!("{settings:?}").contains("hunter2"));
    }

    #[test]
    fn secret_from_file_trims_the_line_break_and_names_the_path_on_error() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("pw");
        fs::write(&p, "s3cret value\r\n").unwrap();
        assert_eq!(Secret::from_file(&p).unwrap().expose(), "s3cret value");
        fs::write(&p, "\n").unwrap();
        let err = Secret::from_file(&p).unwrap_err().to_string();
        assert!(err.contains("is empty") && err.contains(&p.display().to_string()));
        let missing = dir.path().join("absent");
        let err = Secret::from_file(&missing).unwrap_err().to_string();
        assert!(err.contains("absent"), "{err}");
        fs::write(&p, [0xffu8, 0xfe, b'x']).unwrap();
        assert!(matches!(
            Secret::from_file(&p),
            Err(SecretError::FileNotUnicode { .. })
        ));
    }

    #[test]
    fn secret_from_env_names_the_variable_not_the_value() {
        // A name no other test or tool uses; only read here.
        let err = Secret::from_env("SLOPEWARDEN_TEST_SURELY_UNSET_9F3A").unwrap_err();
        assert!(matches!(err, SecretError::EnvMissing { .. }));
        assert!(
            err.to_string()
                .contains("SLOPEWARDEN_TEST_SURELY_UNSET_9F3A")
        );
        // PATH is set in any environment that runs cargo.
        let path = Secret::from_env("PATH").unwrap();
        assert_eq!(format!("{path}"), "***");
    }

    #[test]
    fn message_has_alternative_text_then_html_and_the_given_headers() {
        let bytes = to_rfc5322(&outgoing()).unwrap();
        let raw = String::from_utf8(bytes).unwrap();
        let head = &raw[..raw.find("\r\n\r\n").unwrap()];
        assert!(head.contains("Message-ID: <test."), "{head}");
        assert!(head.contains("Auto-Submitted: auto-generated"));
        // 1_950_000_000 s after the epoch (GNU date -u -d @1950000000).
        assert!(
            head.contains("Date: Fri, 17 Oct 2031 10:40:00 +0000"),
            "{head}"
        );
        assert!(head.contains("multipart/alternative"));
        let text_at = raw.find("Content-Type: text/plain").unwrap();
        let html_at = raw.find("Content-Type: text/html").unwrap();
        assert!(text_at < html_at);
    }

    #[test]
    fn the_same_message_always_serializes_to_the_same_bytes() {
        let mut o = outgoing();
        o.rendered = crate::messages::render::render_notice(
            &crate::messages::render::tests::sample_notice(),
        );
        assert!(o.rendered.chart.is_some());
        assert_eq!(to_rfc5322(&o).unwrap(), to_rfc5322(&o).unwrap());
        let raw = String::from_utf8(to_rfc5322(&o).unwrap()).unwrap();
        assert!(raw.contains("multipart/related"));
        assert!(raw.contains("boundary=\"=_slopewarden.rel."));
    }

    #[test]
    fn bad_addresses_and_ids_are_permanent_errors() {
        let mut o = outgoing();
        o.to = vec!["not an address\r\nBcc: victim@example.org".into()];
        let err = to_message(&o).unwrap_err();
        assert!(
            matches!(err, SendError::BadAddress { field: "To", .. }),
            "{err}"
        );
        assert!(err.is_permanent());
        assert!(!err.to_string().contains('\n'));

        let mut o = outgoing();
        o.to.clear();
        assert!(matches!(to_message(&o), Err(SendError::BadAddress { .. })));

        let mut o = outgoing();
        o.rendered.message_id = "<a\r\nBcc: x@example.org>".into();
        assert!(matches!(to_message(&o), Err(SendError::Build(_))));
    }

    #[test]
    fn subject_is_made_header_safe_even_if_the_rendered_one_is_not() {
        let mut o = outgoing();
        o.rendered.subject = "hello\r\nBcc: victim@example.org".into();
        let raw = String::from_utf8(to_rfc5322(&o).unwrap()).unwrap();
        assert!(!raw.contains("\r\nBcc:"), "{raw}");
        assert!(raw.contains("Subject: hello Bcc: victim@example.org\r\n"));
    }

    #[test]
    fn outbox_file_names_are_safe_and_stable() {
        let o = OutboxDir::new("/tmp/x");
        assert_eq!(
            o.path_for("<finding-17.ab12@lab.example.net>"),
            PathBuf::from("/tmp/x/finding-17.ab12@lab.example.net.eml")
        );
        assert_eq!(
            o.path_for("<../../etc/passwd>"),
            PathBuf::from("/tmp/x/_._.._etc_passwd.eml")
        );
        assert_eq!(o.path_for("<>"), PathBuf::from("/tmp/x/message.eml"));
    }

    #[test]
    fn recording_keeps_messages_and_fails_on_request() {
        let r = Recording::new();
        r.fail_next(SendError::Deferred {
            server: "test".into(),
            code: "451".into(),
            reason: "later".into(),
        });
        let err = r.send(&outgoing()).unwrap_err();
        assert!(err.is_transient());
        assert_eq!(r.count(), 0);
        r.send(&outgoing()).unwrap();
        assert_eq!(r.sent(), vec![outgoing()]);
        assert_eq!(r.take().len(), 1);
        assert_eq!(r.count(), 0);
    }

    #[test]
    fn send_test_email_reports_what_it_sent() {
        let r = Recording::new();
        let report = send_test_email(
            &r,
            "alerts@lab-north.example.net",
            &["analyst@lab-north.example.net".to_string()],
            "lab-north.example.net",
            SystemTime::UNIX_EPOCH + Duration::from_secs(1_950_000_000),
        )
        .unwrap();
        let sent = r.sent();
        assert_eq!(sent.len(), 1);
        assert_eq!(sent[0].rendered.message_id, report.message_id);
        assert!(report.to_string().contains("in-memory recorder"));
    }

    #[test]
    fn settings_that_would_leak_or_cannot_work_are_refused() {
        let plain = SmtpSettings {
            username: Some("ops".into()),
            password: Some(Secret::new("pw")),
            ..SmtpSettings::new("mail.example.net", TlsMode::None)
        };
        let err = Smtp::new(&plain).unwrap_err();
        assert!(matches!(err, SendError::Config(_)) && err.is_permanent());
        assert!(!err.to_string().contains("pw\""));

        let half = SmtpSettings {
            username: Some("ops".into()),
            ..SmtpSettings::new("mail.example.net", TlsMode::StartTls)
        };
        assert!(matches!(Smtp::new(&half), Err(SendError::Config(_))));

        let dir = tempfile::tempdir().unwrap();
        let not_pem = dir.path().join("ca.pem");
        fs::write(&not_pem, "hello").unwrap();
        let bad_ca = SmtpSettings {
            ca_file: Some(not_pem),
            ..SmtpSettings::new("mail.example.net", TlsMode::Implicit)
        };
        let err = Smtp::new(&bad_ca).unwrap_err();
        assert!(
            matches!(err, SendError::Tls { .. }) && err.is_permanent(),
            "{err}"
        );
        let missing_ca = SmtpSettings {
            ca_file: Some(dir.path().join("nope.pem")),
            ..SmtpSettings::new("mail.example.net", TlsMode::StartTls)
        };
        let err = Smtp::new(&missing_ca).unwrap_err();
        assert!(err.to_string().contains("nope.pem"), "{err}");
    }
}
