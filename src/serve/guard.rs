//! What stands between a client and the live server's handlers: the Host allow-list, the security
//! headers every response carries, the acknowledgement token's comparison and the acknowledgement
//! rate limiter.
//!
//! * **Host allow-list.** A request whose `Host` (or absolute-form authority) is not on the list is
//!   answered 421 before any handler runs. By default the list holds the loopback names
//!   (`localhost`, `127.0.0.1`, `[::1]`, any port), so a page served from another name that a
//!   rebinding DNS answer points at this machine cannot read the API.
//! * **Headers.** Content-Security-Policy (the dashboard's one inline script and style are allowed
//!   by their SHA-256, nothing else inline), `X-Frame-Options: DENY`, `X-Content-Type-Options:
//!   nosniff`, `Referrer-Policy: no-referrer`.
//! * **Token.** Compared as SHA-256 digests in constant time ([`token_matches`]), so neither the
//!   content nor the length of the token leaks through timing.
//! * **Rate limit.** Every wrong token locks its client (IPv4 address, IPv6 /64) out of
//!   acknowledging for a delay that doubles with each consecutive failure, and all failures draw
//!   from one global bucket; while locked, or with the bucket empty, acknowledgements are answered
//!   429 without looking at the token.

use std::collections::HashMap;
use std::net::{IpAddr, Ipv6Addr};
use std::sync::{LazyLock, Mutex};
use std::time::{Duration, Instant};

use base64::Engine as _;
use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;

use super::ServeError;

/// SHA-256 of a token (what the server keeps instead of the token).
pub type TokenDigest = [u8; 32];

/// The digest [`token_matches`] compares against.
pub fn token_digest(token: &str) -> TokenDigest {
    Sha256::digest(token.as_bytes()).into()
}

/// Whether `given` is the token whose digest is `expected`. Both sides are hashed to 32 bytes and
/// compared with a constant-time equality, so the time taken depends on neither the position of
/// the first differing byte nor the lengths.
pub fn token_matches(given: &str, expected: &TokenDigest) -> bool {
    token_digest(given).ct_eq(expected).into()
}

/// The names allowed in `Host` by default: loopback only.
pub const LOOPBACK_HOSTS: [&str; 3] = ["localhost", "127.0.0.1", "[::1]"];

/// Normalise an allow-list entry or a Host value's name part: lower case, no trailing dot, IPv6
/// literals in brackets.
pub fn normalise_host_name(name: &str) -> String {
    let n = name.trim().trim_end_matches('.').to_ascii_lowercase();
    match n.parse::<Ipv6Addr>() {
        Ok(v6) => format!("[{v6}]"),
        Err(_) => n,
    }
}

fn valid_port(p: &str) -> bool {
    !p.is_empty() && p.len() <= 5 && p.bytes().all(|b| b.is_ascii_digit())
}

/// The name part of a Host header value (`name`, `name:port`, `[v6]` or `[v6]:port`); `None` when
/// it is malformed.
pub fn host_name(host: &str) -> Option<String> {
    let h = host.trim();
    if h.is_empty() || h.bytes().any(|b| b.is_ascii_whitespace() || b.is_ascii_control() || b == b'/' || b == b'@') {
        return None;
    }
    if let Some(rest) = h.strip_prefix('[') {
        let end = rest.find(']')?;
        let after = &rest[end + 1..];
        if !(after.is_empty() || after.strip_prefix(':').is_some_and(valid_port)) {
            return None;
        }
        let v6: Ipv6Addr = rest[..end].parse().ok()?;
        return Some(format!("[{v6}]"));
    }
    let name = match h.split_once(':') {
        Some((n, p)) if valid_port(p) => n,
        Some(_) => return None,
        None => h,
    };
    (!name.is_empty()).then(|| normalise_host_name(name))
}

/// Whether a Host header value names an allowed host (`allowed` holds normalised names).
pub fn host_allowed(host: &str, allowed: &[String]) -> bool {
    host_name(host).is_some_and(|n| allowed.contains(&n))
}

/// The dashboard page.
pub const DASHBOARD_HTML: &str = include_str!("dashboard.html");

fn inline_hash(page: &str, open: &str, close: &str) -> String {
    let body = page.split_once(open).and_then(|(_, rest)| rest.split_once(close)).map(|(b, _)| b).unwrap_or("");
    format!("'sha256-{}'", base64::engine::general_purpose::STANDARD.encode(Sha256::digest(body.as_bytes())))
}

/// The Content-Security-Policy of every response: the dashboard's inline `<script>` and
/// `<style>` by hash, pictures, fetches and the event stream from this origin only, no framing,
/// no plugins, no forms, no base URI.
pub static CONTENT_SECURITY_POLICY: LazyLock<String> = LazyLock::new(|| {
    format!(
        "default-src 'none'; script-src {}; style-src {}; img-src 'self'; connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'",
        inline_hash(DASHBOARD_HTML, "<script>", "</script>"),
        inline_hash(DASHBOARD_HTML, "<style>", "</style>"),
    )
});

/// Limits of the acknowledgement rate limiter.
#[derive(Debug, Clone, PartialEq)]
pub struct AckLimits {
    /// Lock-out after a client's first wrong token; it doubles with each further failure.
    pub backoff_first: Duration,
    /// The longest lock-out.
    pub backoff_max: Duration,
    /// A client's failure count is forgotten after this long without a failure.
    pub forget_after: Duration,
    /// Wrong tokens all clients together may give at once (the global bucket's size).
    pub global_burst: u32,
    /// One failure is given back to the global bucket per this interval.
    pub global_refill: Duration,
}

impl Default for AckLimits {
    fn default() -> Self {
        Self {
            backoff_first: Duration::from_secs(1),
            backoff_max: Duration::from_secs(15 * 60),
            forget_after: Duration::from_secs(24 * 3600),
            global_burst: 20,
            global_refill: Duration::from_secs(10),
        }
    }
}

/// Clients remembered at most (the oldest are forgotten first).
const MAX_CLIENTS: usize = 4096;

#[derive(Debug, Clone, Copy)]
struct Failures {
    count: u32,
    locked_until: Instant,
    last: Instant,
}

#[derive(Debug)]
struct LimiterState {
    clients: HashMap<IpAddr, Failures>,
    global_tokens: f64,
    global_at: Instant,
}

/// Rate limiter and back-off for acknowledgements.
#[derive(Debug)]
pub struct AckLimiter {
    limits: AckLimits,
    state: Mutex<LimiterState>,
}

/// The key a client is counted under: its IPv4 address, or its IPv6 /64.
fn client_key(ip: IpAddr) -> IpAddr {
    match ip {
        IpAddr::V4(_) => ip,
        IpAddr::V6(v6) => match v6.to_ipv4_mapped() {
            Some(v4) => IpAddr::V4(v4),
            None => {
                let s = v6.segments();
                IpAddr::V6(Ipv6Addr::new(s[0], s[1], s[2], s[3], 0, 0, 0, 0))
            }
        },
    }
}

impl AckLimiter {
    /// A limiter with these limits, its global bucket full.
    pub fn new(limits: AckLimits) -> Self {
        let state = LimiterState { clients: HashMap::new(), global_tokens: f64::from(limits.global_burst), global_at: Instant::now() };
        Self { limits, state: Mutex::new(state) }
    }

    fn refill(&self, s: &mut LimiterState, now: Instant) {
        let dt = now.saturating_duration_since(s.global_at).as_secs_f64();
        let per = self.limits.global_refill.as_secs_f64().max(1e-9);
        s.global_tokens = (s.global_tokens + dt / per).min(f64::from(self.limits.global_burst));
        s.global_at = now;
    }

    /// `Ok(())` when `ip` may try a token now; else how long it has to wait.
    pub fn admit(&self, ip: IpAddr, now: Instant) -> Result<(), Duration> {
        let Ok(mut s) = self.state.lock() else { return Err(self.limits.backoff_max) };
        if let Some(f) = s.clients.get(&client_key(ip))
            && f.locked_until > now
        {
            return Err(f.locked_until - now);
        }
        self.refill(&mut s, now);
        if s.global_tokens < 1.0 {
            let per = self.limits.global_refill.as_secs_f64();
            return Err(Duration::from_secs_f64((1.0 - s.global_tokens) * per));
        }
        Ok(())
    }

    /// Record a wrong token from `ip`: lock it out for the next doubling of its delay.
    pub fn failed(&self, ip: IpAddr, now: Instant) {
        let Ok(mut s) = self.state.lock() else { return };
        self.refill(&mut s, now);
        s.global_tokens = (s.global_tokens - 1.0).max(0.0);
        if s.clients.len() >= MAX_CLIENTS {
            let forget = self.limits.forget_after;
            s.clients.retain(|_, f| now.saturating_duration_since(f.last) < forget || f.locked_until > now);
            if s.clients.len() >= MAX_CLIENTS {
                let mut by_age: Vec<(Instant, IpAddr)> = s.clients.iter().map(|(k, f)| (f.last, *k)).collect();
                by_age.sort();
                for (_, k) in by_age.iter().take(s.clients.len() - MAX_CLIENTS / 2) {
                    s.clients.remove(k);
                }
            }
        }
        let forget = self.limits.forget_after;
        let f = s.clients.entry(client_key(ip)).or_insert(Failures { count: 0, locked_until: now, last: now });
        if now.saturating_duration_since(f.last) >= forget {
            f.count = 0;
        }
        f.count = f.count.saturating_add(1);
        f.last = now;
        let lock = self.limits.backoff_first.saturating_mul(1u32 << (f.count - 1).min(20)).min(self.limits.backoff_max);
        f.locked_until = now + lock;
    }

    /// Record a right token from `ip`: its failures are forgotten.
    pub fn succeeded(&self, ip: IpAddr) {
        if let Ok(mut s) = self.state.lock() {
            s.clients.remove(&client_key(ip));
        }
    }
}

/// Longest `by` of an acknowledgement \[characters\].
pub const BY_MAX_CHARS: usize = 64;

/// The acknowledging operator's name, trimmed: empty gives `operator`; more than
/// [`BY_MAX_CHARS`] characters or a control character is refused with a message naming the field.
pub fn check_by(by: &str) -> Result<String, String> {
    let t = by.trim();
    if t.chars().count() > BY_MAX_CHARS {
        return Err(format!("by: expected at most {BY_MAX_CHARS} printable characters, got {}", t.chars().count()));
    }
    if let Some(c) = t.chars().find(|c| c.is_control() || matches!(c, '\u{200b}'..='\u{200f}' | '\u{2028}'..='\u{202e}' | '\u{2066}'..='\u{2069}')) {
        return Err(format!("by: expected printable characters, got {:?}", c));
    }
    Ok(if t.is_empty() { "operator".into() } else { t.into() })
}

/// The environment variable an acknowledgement token may come from.
pub const ACK_TOKEN_ENV: &str = "NEPHOCAST_ACK_TOKEN";

/// Longest acknowledgement token \[bytes\].
const TOKEN_MAX_BYTES: usize = 1024;

/// Shortest acknowledgement token without a warning \[characters\].
const TOKEN_SHORT_CHARS: usize = 16;

/// The acknowledgement token from a file (its first line, surrounding whitespace trimmed) or from
/// the value of [`ACK_TOKEN_ENV`] (never from the command line, where `ps` shows it). Returns the
/// token (none when neither is given) and warnings: a file others can read, a short token.
///
/// # Errors
/// Both sources given, an unreadable file, an empty, overlong or multi-line token; the message
/// names the file or the variable.
pub fn read_ack_token(file: Option<&std::path::Path>, env_value: Option<String>) -> Result<(Option<String>, Vec<String>), ServeError> {
    let mut warnings = vec![];
    let (token, source) = match (file, env_value) {
        (Some(f), Some(_)) => return Err(ServeError::TokenSources(f.to_path_buf())),
        (None, None) => return Ok((None, warnings)),
        (None, Some(v)) => (v.trim().to_string(), ACK_TOKEN_ENV.to_string()),
        (Some(f), None) => {
            let origin = format!("--ack-token-file {}", f.display());
            let refused = |expected: String| ServeError::Token { origin: origin.clone(), expected };
            let meta = std::fs::metadata(f).map_err(|error| ServeError::TokenFile { path: f.to_path_buf(), error })?;
            if !meta.is_file() {
                return Err(refused("a regular file".into()));
            }
            if meta.len() > TOKEN_MAX_BYTES as u64 + 2 {
                return Err(refused(format!("a token of at most {TOKEN_MAX_BYTES} bytes, the file has {}", meta.len())));
            }
            #[cfg(unix)]
            {
                use std::os::unix::fs::PermissionsExt as _;
                let mode = meta.permissions().mode();
                if mode & 0o077 != 0 {
                    warnings.push(format!("--ack-token-file {}: readable by others (mode {:o}); chmod 600 it", f.display(), mode & 0o777));
                }
            }
            let text = std::fs::read_to_string(f).map_err(|error| ServeError::TokenFile { path: f.to_path_buf(), error })?;
            let t = text.trim();
            if t.lines().count() > 1 {
                return Err(refused(format!("the token on one line, found {} lines", t.lines().count())));
            }
            (t.to_string(), origin)
        }
    };
    let refused = |expected: String| Err(ServeError::Token { origin: source.clone(), expected });
    if token.is_empty() {
        return refused("a token, found none (empty)".into());
    }
    if token.len() > TOKEN_MAX_BYTES {
        return refused(format!("a token of at most {TOKEN_MAX_BYTES} bytes, got {}", token.len()));
    }
    if token.chars().any(char::is_control) {
        return refused("printable characters in the token".into());
    }
    if token.chars().count() < TOKEN_SHORT_CHARS {
        warnings.push(format!("{source}: the token has {} characters; use at least {TOKEN_SHORT_CHARS} random ones", token.chars().count()));
    }
    Ok((Some(token), warnings))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn token_compare_is_exact() {
        let d = token_digest("correct horse battery staple");
        assert!(token_matches("correct horse battery staple", &d));
        assert!(!token_matches("correct horse battery stapl", &d));
        assert!(!token_matches("correct horse battery staplf", &d));
        assert!(!token_matches("Correct horse battery staple", &d));
        assert!(!token_matches("correct horse battery staple ", &d));
        assert!(!token_matches("", &d));
        let empty = token_digest("");
        assert!(token_matches("", &empty));
        assert!(!token_matches("\0", &empty));
    }

    #[test]
    fn host_names_with_and_without_port() {
        let allowed: Vec<String> = LOOPBACK_HOSTS.iter().map(|h| normalise_host_name(h)).collect();
        for ok in ["localhost", "LOCALHOST:8765", "localhost.", "127.0.0.1", "127.0.0.1:80", "[::1]", "[::1]:8765", "[0:0:0:0:0:0:0:1]:1"] {
            assert!(host_allowed(ok, &allowed), "{ok}");
        }
        for bad in ["evil.example", "evil.example:8765", "localhost.evil.example", "127.0.0.2", "[::2]", "", "localhost:", "localhost:x", "localhost:123456", "[::1", "user@localhost", "localhost/x", "127.0.0.1 :80"] {
            assert!(!host_allowed(bad, &allowed), "{bad}");
        }
        assert_eq!(normalise_host_name("::1"), "[::1]");
    }

    #[test]
    fn backoff_doubles_and_success_forgets() {
        let l = AckLimiter::new(AckLimits::default());
        let ip: IpAddr = "192.0.2.7".parse().unwrap();
        let t0 = Instant::now();
        assert!(l.admit(ip, t0).is_ok());
        l.failed(ip, t0);
        assert_eq!(l.admit(ip, t0), Err(Duration::from_secs(1)));
        let t1 = t0 + Duration::from_secs(1);
        assert!(l.admit(ip, t1).is_ok());
        l.failed(ip, t1);
        assert_eq!(l.admit(ip, t1), Err(Duration::from_secs(2)));
        // Another client is not held back by this one.
        assert!(l.admit("192.0.2.8".parse().unwrap(), t1).is_ok());
        // One /64 is one client.
        let a: IpAddr = "2001:db8::1".parse().unwrap();
        l.failed(a, t1);
        assert!(l.admit("2001:db8::ffff".parse().unwrap(), t1).is_err());
        l.succeeded(ip);
        assert!(l.admit(ip, t1).is_ok());
        // The lock-out is capped.
        for k in 0..40 {
            l.failed(ip, t1 + Duration::from_secs(k));
        }
        assert!(l.admit(ip, t1 + Duration::from_secs(40)).unwrap_err() <= Duration::from_secs(15 * 60));
    }

    #[test]
    fn global_bucket_holds_back_many_clients() {
        let l = AckLimiter::new(AckLimits::default());
        let t = Instant::now();
        for k in 0..20u8 {
            let ip = IpAddr::from([198, 51, 100, k]);
            assert!(l.admit(ip, t).is_ok());
            l.failed(ip, t);
        }
        let fresh = IpAddr::from([203, 0, 113, 1]);
        assert!(l.admit(fresh, t).is_err(), "the 21st failure within the burst is held back");
        assert!(l.admit(fresh, t + Duration::from_secs(10)).is_ok(), "one failure refilled after 10 s");
    }

    #[test]
    fn by_is_trimmed_bounded_and_printable() {
        assert_eq!(check_by("  Ana  ").unwrap(), "Ana");
        assert_eq!(check_by("").unwrap(), "operator");
        assert_eq!(check_by(&"é".repeat(64)).unwrap().chars().count(), 64);
        assert!(check_by(&"x".repeat(65)).unwrap_err().starts_with("by:"));
        assert!(check_by("a\nb").is_err());
        assert!(check_by("a\u{202e}b").is_err());
    }

    #[test]
    fn csp_allows_the_dashboards_inline_code_by_hash() {
        let csp = CONTENT_SECURITY_POLICY.as_str();
        assert!(csp.contains("script-src 'sha256-"), "{csp}");
        assert!(csp.contains("style-src 'sha256-"), "{csp}");
        assert!(!csp.contains("unsafe-inline"));
        // The page has nothing inline the hashes would not cover.
        assert!(!DASHBOARD_HTML.contains(" onclick="));
        assert!(!DASHBOARD_HTML.contains(" style="));
        assert_eq!(DASHBOARD_HTML.matches("<script>").count(), 1);
        assert_eq!(DASHBOARD_HTML.matches("<style>").count(), 1);
    }
}
