//! A real SMTP server for tests.
//!
//! Runs Debian's `python3-aiosmtpd` (an independent SMTP implementation) as
//! a child process on a free loopback port. It demands TLS (STARTTLS before
//! anything else, or TLS from the first byte) and AUTH (PLAIN and LOGIN, or
//! only the mechanisms a test names) before it takes mail. Its certificate
//! is issued at test time by a throwaway CA made with `rcgen`; point the
//! client at [`TestSmtp::ca_file`] to trust it.
//!
//! Every accepted message is written to a spool folder, atomically, before
//! the server answers `250`, so once a send returns `Ok` the message is
//! visible through [`TestSmtp::received`] (raw bytes plus the envelope).
//!
//! [`TestSmtp::stop`] kills the server (an outage: connections are refused);
//! [`TestSmtp::restart`] starts it again on the same port with the same
//! spool, so a test can check delivery after an outage, exactly once.
//!
//! Include it from a test file with
//! `#[path = "support/smtp.rs"] mod smtp;`.
//!
//! Recipients whose local part starts with `defer` get `451` (try later) and
//! those starting with `reject` get `550` (no such mailbox), so tests can
//! provoke both kinds of refusal from a real server.

#![allow(dead_code)]

use std::io::{BufRead, BufReader, Write};
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Child, ChildStdin, Command, Stdio};
use std::sync::mpsc;
use std::time::Duration;

use slopewarden::messages::{Secret, SmtpSettings, TlsMode};

/// The login the server accepts.
pub const USERNAME: &str = "field-ops";
/// The password the server accepts (invented for tests).
pub const PASSWORD: &str = "tern-7-gravel-quartz";

/// How long the server may take to start before the test fails.
const START_TIMEOUT: Duration = Duration::from_secs(30);

/// How the server protects the connection.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Security {
    /// Plain connection; STARTTLS is required before MAIL or AUTH.
    StartTls,
    /// TLS from the first byte.
    Implicit,
}

/// Server options.
#[derive(Debug, Clone)]
pub struct Options {
    /// Connection protection.
    pub security: Security,
    /// AUTH mechanisms offered; empty means PLAIN and LOGIN.
    pub mechanisms: Vec<&'static str>,
}

impl Options {
    /// PLAIN and LOGIN offered, with the given protection.
    pub fn new(security: Security) -> Options {
        Options {
            security,
            mechanisms: Vec::new(),
        }
    }
}

/// One message as the server received it.
#[derive(Debug, Clone)]
pub struct Received {
    /// The DATA bytes exactly as received (after dot-unstuffing).
    pub raw: Vec<u8>,
    /// MAIL FROM.
    pub mail_from: String,
    /// RCPT TO, in order.
    pub rcpt_to: Vec<String>,
    /// Whether the session was encrypted when DATA arrived.
    pub tls: bool,
    /// The login that authenticated the session, if any.
    pub login: Option<String>,
}

/// The server's program. Reads one JSON line of settings from stdin, prints
/// `{"port": N}` once listening, and exits when stdin closes (so a crashed
/// test leaves no server behind).
const SERVER_PY: &str = r#"
import asyncio, json, os, ssl, sys, threading, time
from aiosmtpd.smtp import SMTP, AuthResult, LoginPassword

cfg = json.loads(sys.stdin.readline())
spool = cfg["spool"]
counter = [0]

def write_atomically(path, data):
    tmp = os.path.join(os.path.dirname(path), "." + os.path.basename(path) + ".tmp")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.rename(tmp, path)

class Handler:
    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
        local = address.split("@")[0].lower()
        if local.startswith("defer"):
            return "451 4.3.0 mailbox busy, try again later"
        if local.startswith("reject"):
            return "550 5.1.1 no such mailbox here"
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):
        counter[0] += 1
        name = "%020d-%d-%d" % (time.time_ns(), os.getpid(), counter[0])
        login = session.auth_data if session.authenticated else None
        meta = {
            "mail_from": envelope.mail_from,
            "rcpt_to": list(envelope.rcpt_tos),
            "tls": server.transport.get_extra_info("ssl_object") is not None,
            "login": login,
        }
        write_atomically(os.path.join(spool, name + ".json"), json.dumps(meta).encode())
        write_atomically(os.path.join(spool, name + ".eml"), envelope.original_content)
        return "250 2.0.0 queued as " + name

def authenticator(server, session, envelope, mechanism, auth_data):
    ok = (isinstance(auth_data, LoginPassword)
          and auth_data.login == cfg["username"].encode()
          and auth_data.password == cfg["password"].encode())
    if ok:
        return AuthResult(success=True, auth_data=cfg["username"])
    return AuthResult(success=False, handled=False)

def tls_context():
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    ctx.load_cert_chain(cfg["cert"], cfg["key"])
    return ctx

async def main():
    loop = asyncio.get_running_loop()
    handler = Handler()
    implicit = cfg["security"] == "implicit"
    offered = cfg["mechanisms"] or ["PLAIN", "LOGIN"]
    excluded = [m for m in ("PLAIN", "LOGIN") if m not in offered]

    def factory():
        return SMTP(
            handler,
            hostname="mail.test.invalid",
            tls_context=None if implicit else tls_context(),
            require_starttls=not implicit,
            auth_required=True,
            # With implicit TLS the whole connection is already encrypted.
            auth_require_tls=not implicit,
            auth_exclude_mechanism=excluded,
            authenticator=authenticator,
            loop=loop,
        )

    server = await loop.create_server(
        factory, host="127.0.0.1", port=cfg["port"],
        ssl=tls_context() if implicit else None, reuse_address=True)
    port = server.sockets[0].getsockname()[1]
    print(json.dumps({"port": port}), flush=True)
    stdin_closed = loop.create_future()
    def watch_stdin():
        sys.stdin.read()
        loop.call_soon_threadsafe(stdin_closed.set_result, None)
    threading.Thread(target=watch_stdin, daemon=True).start()
    await stdin_closed
    server.close()

asyncio.run(main())
"#;

/// A running (or stopped) test SMTP server.
pub struct TestSmtp {
    dir: tempfile::TempDir,
    options: Options,
    port: u16,
    child: Option<(Child, ChildStdin)>,
    starts: u32,
}

fn python() -> String {
    if let Ok(p) = std::env::var("SLOPEWARDEN_TEST_PYTHON") {
        return p;
    }
    // Debian's interpreter, which sees Debian's python3-aiosmtpd even when
    // another python3 comes first on PATH.
    if Path::new("/usr/bin/python3").exists() {
        "/usr/bin/python3".to_string()
    } else {
        "python3".to_string()
    }
}

impl TestSmtp {
    /// Starts a server with PLAIN and LOGIN offered.
    pub fn start(security: Security) -> TestSmtp {
        TestSmtp::start_with(Options::new(security))
    }

    /// Starts a server with the given options on a free port.
    pub fn start_with(options: Options) -> TestSmtp {
        let dir = tempfile::tempdir().expect("temp dir for the test SMTP server");
        std::fs::create_dir(dir.path().join("spool")).expect("spool dir");
        write_certificates(dir.path());
        let mut server = TestSmtp {
            dir,
            options,
            port: 0,
            child: None,
            starts: 0,
        };
        server.launch();
        server
    }

    /// Where the server listens.
    pub fn host(&self) -> &'static str {
        "127.0.0.1"
    }

    /// The port, the same across restarts.
    pub fn port(&self) -> u16 {
        self.port
    }

    /// The CA certificate (PEM) that issued the server's certificate.
    pub fn ca_file(&self) -> PathBuf {
        self.dir.path().join("ca.pem")
    }

    /// Client settings that satisfy this server: its port, the matching TLS
    /// mode, the test login and the CA file, with a 10-second timeout.
    pub fn settings(&self) -> SmtpSettings {
        SmtpSettings {
            host: self.host().to_string(),
            port: self.port,
            tls: match self.options.security {
                Security::StartTls => TlsMode::StartTls,
                Security::Implicit => TlsMode::Implicit,
            },
            username: Some(USERNAME.to_string()),
            password: Some(Secret::new(PASSWORD)),
            ca_file: Some(self.ca_file()),
            timeout: Duration::from_secs(10),
        }
    }

    /// Kills the server; connections to its port are refused until
    /// [`TestSmtp::restart`].
    pub fn stop(&mut self) {
        if let Some((mut child, stdin)) = self.child.take() {
            drop(stdin);
            // Already exited is fine: the outcome (no server) is the same.
            if child.kill().is_err() {
                eprintln!("test SMTP server had already exited");
            }
            child.wait().expect("reap the test SMTP server");
        }
    }

    /// Starts the server again on the same port, keeping what it received.
    pub fn restart(&mut self) {
        self.stop();
        self.launch();
    }

    /// True while the server process is alive.
    pub fn is_running(&mut self) -> bool {
        match &mut self.child {
            Some((child, _)) => matches!(child.try_wait(), Ok(None)),
            None => false,
        }
    }

    /// Everything received so far, oldest first.
    pub fn received(&self) -> Vec<Received> {
        let spool = self.dir.path().join("spool");
        let mut names: Vec<PathBuf> = std::fs::read_dir(&spool)
            .expect("read the spool")
            .map(|e| e.expect("spool entry").path())
            .filter(|p| p.extension().is_some_and(|e| e == "eml"))
            .collect();
        names.sort();
        names
            .into_iter()
            .map(|eml| {
                let raw = std::fs::read(&eml).expect("read a spooled message");
                let meta: serde_json::Value = serde_json::from_slice(
                    &std::fs::read(eml.with_extension("json")).expect("read envelope"),
                )
                .expect("envelope JSON");
                Received {
                    raw,
                    mail_from: meta["mail_from"].as_str().unwrap_or_default().to_string(),
                    rcpt_to: meta["rcpt_to"]
                        .as_array()
                        .map(|a| {
                            a.iter()
                                .filter_map(|v| v.as_str().map(str::to_string))
                                .collect()
                        })
                        .unwrap_or_default(),
                    tls: meta["tls"].as_bool().unwrap_or(false),
                    login: meta["login"].as_str().map(str::to_string),
                }
            })
            .collect()
    }

    /// The server's log (its stderr), for failure messages.
    pub fn log(&self) -> String {
        let mut out = String::new();
        for n in 1..=self.starts {
            let p = self.dir.path().join(format!("server-{n}.log"));
            if let Ok(s) = std::fs::read_to_string(p) {
                out.push_str(&s);
            }
        }
        out
    }

    fn launch(&mut self) {
        self.starts += 1;
        let log_path = self.dir.path().join(format!("server-{}.log", self.starts));
        let log = std::fs::File::create(&log_path).expect("server log file");
        let mut child = Command::new(python())
            .arg("-c")
            .arg(SERVER_PY)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::from(log))
            .spawn()
            .unwrap_or_else(|e| panic!("cannot run {} for the test SMTP server: {e}", python()));
        let mut stdin = child.stdin.take().expect("server stdin");
        let stdout = child.stdout.take().expect("server stdout");
        let config = serde_json::json!({
            "spool": self.dir.path().join("spool"),
            "cert": self.dir.path().join("server.pem"),
            "key": self.dir.path().join("server.key"),
            "port": self.port,
            "security": match self.options.security {
                Security::StartTls => "starttls",
                Security::Implicit => "implicit",
            },
            "mechanisms": self.options.mechanisms,
            "username": USERNAME,
            "password": PASSWORD,
        });
        writeln!(stdin, "{config}").expect("send settings to the test SMTP server");
        stdin.flush().expect("flush settings");

        // Wait for the "listening" line without blocking forever.
        let (tx, rx) = mpsc::channel();
        std::thread::spawn(move || {
            let mut line = String::new();
            let read = BufReader::new(stdout).read_line(&mut line);
            // The receiver may be gone after a timeout; nothing to do then.
            tx.send(read.map(|_| line)).ok();
        });
        let line = match rx.recv_timeout(START_TIMEOUT) {
            Ok(Ok(line)) if !line.trim().is_empty() => line,
            other => {
                child.kill().ok();
                child.wait().ok();
                panic!(
                    "the test SMTP server did not start ({other:?}). It needs Debian's \
                     python3-aiosmtpd (apt-get install python3-aiosmtpd). Its log:\n{}",
                    std::fs::read_to_string(&log_path).unwrap_or_default()
                );
            }
        };
        let ready: serde_json::Value = serde_json::from_str(line.trim()).expect("ready line");
        let port = ready["port"].as_u64().expect("port in ready line") as u16;
        if self.port != 0 {
            assert_eq!(port, self.port, "restart must reuse the port");
        }
        self.port = port;
        self.child = Some((child, stdin));
    }
}

impl Drop for TestSmtp {
    fn drop(&mut self) {
        self.stop();
    }
}

/// Writes `ca.pem`, `server.pem` and `server.key` for `localhost` and
/// `127.0.0.1`, the server certificate issued by a fresh CA.
fn write_certificates(dir: &Path) {
    use rcgen::{BasicConstraints, CertificateParams, DnType, IsCa, Issuer, KeyPair};
    let ca_key = KeyPair::generate().expect("CA key");
    let mut ca_params = CertificateParams::new(Vec::<String>::new()).expect("CA params");
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    ca_params
        .distinguished_name
        .push(DnType::CommonName, "slopewarden test CA");
    let ca_cert = ca_params.self_signed(&ca_key).expect("CA certificate");
    let issuer = Issuer::new(ca_params, ca_key);

    let server_key = KeyPair::generate().expect("server key");
    let mut server_params =
        CertificateParams::new(vec!["localhost".to_string(), "127.0.0.1".to_string()])
            .expect("server params");
    server_params
        .distinguished_name
        .push(DnType::CommonName, "mail.test.invalid");
    let server_cert = server_params
        .signed_by(&server_key, &issuer)
        .expect("server certificate");

    std::fs::write(dir.join("ca.pem"), ca_cert.pem()).expect("write ca.pem");
    std::fs::write(dir.join("server.pem"), server_cert.pem()).expect("write server.pem");
    std::fs::write(dir.join("server.key"), server_key.serialize_pem()).expect("write server.key");
}

/// A local port with a listener that accepts connections and never says a
/// word: a server that hangs. Keep the returned listener alive.
pub fn silent_listener() -> (TcpListener, u16) {
    let listener = TcpListener::bind("127.0.0.1:0").expect("bind a silent listener");
    let port = listener.local_addr().expect("local addr").port();
    (listener, port)
}
