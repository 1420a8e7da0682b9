//! Which `Host` a request may name, and whether a write's `Origin` is the
//! server's own.
//!
//! A web page can make a browser send requests to a server on the loopback
//! address by pointing its own name at 127.0.0.1 (DNS rebinding); those
//! requests carry the page's name in `Host`. A request is only served when its
//! `Host` is the address the server listens on, `localhost` for a loopback or
//! all-interfaces listener, or a name in the configured list (`--allow-host`).

use std::net::IpAddr;

use axum::http::uri::Authority;
use axum::http::Uri;

/// The hosts a server answers to.
#[derive(Debug, Clone)]
pub struct HostPolicy {
    listen: IpAddr,
    names: Vec<String>,
}

fn normal_name(name: &str) -> String {
    name.trim_end_matches('.').to_ascii_lowercase()
}

impl HostPolicy {
    /// Hosts for a server listening on `listen`, plus `names` (case does not matter).
    pub fn new(listen: IpAddr, names: &[String]) -> HostPolicy {
        HostPolicy {
            listen,
            names: names.iter().map(|n| normal_name(n)).collect(),
        }
    }

    /// Whether a `Host` header's value (`name[:port]`, `ip[:port]`,
    /// `[ipv6][:port]`) names this server. The port is not compared: the
    /// connection already reached the right one.
    pub fn allows(&self, host: &str) -> bool {
        let Ok(authority) = host.parse::<Authority>() else {
            return false;
        };
        if authority.as_str().contains('@') {
            return false;
        }
        let name = authority.host();
        let bare = name.trim_start_matches('[').trim_end_matches(']');
        if let Ok(ip) = bare.parse::<IpAddr>() {
            return ip == self.listen
                || self.listen.is_unspecified()
                || (ip.is_loopback() && self.listen.is_loopback());
        }
        let name = normal_name(name);
        (name == "localhost" && (self.listen.is_loopback() || self.listen.is_unspecified()))
            || self.names.contains(&name)
    }
}

/// Whether a browser's `Origin` (`scheme://host[:port]`) is the same site as
/// the request's `Host`: a write from another site's page is refused even when
/// a browser would send it without asking first (a form or `text/plain` post).
pub fn same_origin(origin: &str, host: &str) -> bool {
    let Ok(uri) = origin.parse::<Uri>() else {
        return false;
    };
    let (Some(scheme), Some(authority)) = (uri.scheme_str(), uri.authority()) else {
        return false;
    };
    let default_port = match scheme {
        "http" => 80,
        "https" => 443,
        _ => return false,
    };
    let Ok(host) = host.parse::<Authority>() else {
        return false;
    };
    authority.host().eq_ignore_ascii_case(host.host())
        && authority.port_u16().unwrap_or(default_port) == host.port_u16().unwrap_or(default_port)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn loopback_servers_answer_to_their_own_names_only() {
        let policy = HostPolicy::new("127.0.0.1".parse().unwrap(), &[]);
        for ok in [
            "127.0.0.1:7878",
            "127.0.0.1",
            "localhost:7878",
            "LOCALHOST",
            "[::1]:7878",
        ] {
            assert!(policy.allows(ok), "{ok}");
        }
        // The rebinding case: another site's name pointed at 127.0.0.1.
        for refused in [
            "evil.example",
            "evil.example:7878",
            "10.0.0.5:7878",
            "",
            "a b",
            "user@127.0.0.1",
        ] {
            assert!(!policy.allows(refused), "{refused}");
        }
    }

    #[test]
    fn configured_names_and_all_interfaces() {
        let names = vec!["Reward.Befit.svc".to_string()];
        let policy = HostPolicy::new("0.0.0.0".parse().unwrap(), &names);
        for ok in [
            "reward.befit.svc:7878",
            "reward.befit.svc.",
            "10.1.2.3:7878",
            "localhost",
        ] {
            assert!(policy.allows(ok), "{ok}");
        }
        assert!(!policy.allows("evil.example"));
        let policy = HostPolicy::new("10.0.0.5".parse().unwrap(), &names);
        assert!(policy.allows("10.0.0.5:7878"));
        assert!(!policy.allows("10.0.0.6:7878"));
        assert!(!policy.allows("localhost:7878"));
    }

    #[test]
    fn origins_match_their_host_with_default_ports() {
        assert!(same_origin("http://127.0.0.1:7878", "127.0.0.1:7878"));
        assert!(same_origin("http://reward.svc", "reward.svc:80"));
        assert!(same_origin("https://reward.svc", "reward.svc:443"));
        assert!(!same_origin("http://evil.example", "127.0.0.1:7878"));
        assert!(!same_origin("http://127.0.0.1:9999", "127.0.0.1:7878"));
        // Sandboxed frames and file pages send `null` (RFC 6454 §7.3).
        assert!(!same_origin("null", "127.0.0.1:7878"));
    }
}
