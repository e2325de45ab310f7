//! `live` (live mode, or its configuration check) and `registers` (the Modbus register map).

use anyhow::{Result, bail};

use super::args::{LiveArgs, RegistersArgs};

/// `live`: check the configuration, or start the service and wait for it.
pub(super) fn cmd_live(a: LiveArgs) -> Result<()> {
    let (ack_token, mut warnings) = crate::serve::guard::read_ack_token(a.ack_token_file.as_deref(), std::env::var(crate::serve::guard::ACK_TOKEN_ENV).ok())?;
    let (check, incoming) = (a.check, a.incoming.clone());
    let opts = live_options(a, ack_token)?;
    if check {
        for line in crate::serve::check(&opts)? {
            crate::say!("{line}");
        }
        crate::say!("configuration OK");
        return Ok(());
    }
    let h = crate::serve::start(opts)?;
    warnings.extend(h.warnings.iter().cloned());
    for w in &warnings {
        eprintln!("warning: {w}");
    }
    let scheme = if h.tls { "https" } else { "http" };
    crate::say!("live on {} — dashboard at {scheme}://{}/ (advisory only, not a protection system)", incoming.display(), h.addr);
    if let Some(m) = h.modbus_addr {
        crate::say!("Modbus TCP registers (read-only) at {m}");
    }
    h.wait();
    Ok(())
}

/// The live mode's options from its arguments (the webhook URL read from its file).
fn live_options(a: LiveArgs, ack_token: Option<String>) -> Result<crate::serve::LiveOptions> {
    let secs = |name: &str, v: f64| -> Result<std::time::Duration> {
        if !(0.1..=3600.0).contains(&v) {
            bail!("--{name}: expected 0.1 to 3600 s, got {v}");
        }
        Ok(std::time::Duration::from_secs_f64(v))
    };
    let server = crate::serve::ServerOptions {
        header_timeout: secs("header-timeout-s", a.header_timeout_s)?,
        body_timeout: secs("body-timeout-s", a.body_timeout_s)?,
        idle_timeout: secs("idle-timeout-s", a.idle_timeout_s)?,
        max_connections: a.max_connections,
        allowed_hosts: a.allow_hosts,
        allow_non_loopback: a.allow_non_loopback,
        tls: a.tls_cert.zip(a.tls_key).map(|(cert_pem, key_pem)| crate::serve::TlsFiles { cert_pem, key_pem }),
        modbus: a.modbus_bind.map(|bind| crate::serve::modbus::ModbusOptions {
            bind,
            allow_non_loopback: a.modbus_allow_non_loopback,
            max_connections: a.modbus_max_connections,
            max_frame_age_s: a.modbus_max_frame_age_s,
            ..Default::default()
        }),
        webhook: match &a.webhook_url_file {
            Some(p) => {
                let text = std::fs::read_to_string(p).map_err(|e| anyhow::anyhow!("--webhook-url-file {}: {e}", p.display()))?;
                Some(crate::serve::notify::WebhookOptions::new(text.trim()))
            }
            None => None,
        },
        ..Default::default()
    };
    let health = crate::serve::ops::HealthOptions {
        frame_interval_s: a.frame_interval_s,
        camera_down_after_s: a.camera_down_after_s,
        measurements: a.measurements,
        measurement_max_age_s: a.measurement_max_age_s,
        retention: match (a.archive, a.delete_processed) {
            (Some(d), _) => crate::serve::ops::Retention::Archive(d),
            (None, true) => crate::serve::ops::Retention::Delete,
            (None, false) => crate::serve::ops::Retention::Keep,
        },
        archive_keep_days: a.archive_keep_days,
        log_json: a.log_json,
    };
    Ok(crate::serve::LiveOptions {
        site: a.site,
        incoming: a.incoming,
        db: a.db,
        bind: a.bind,
        ack_token,
        server,
        keep_s: (a.keep_days * 86400.0) as i64,
        poll_ms: a.poll_ms.max(20),
        overlay_every: 1,
        health,
    })
}

/// `registers`: the Modbus register map of a site as markdown.
pub(super) fn cmd_registers(a: RegistersArgs) -> Result<()> {
    let site = crate::config::Site::load_without_camera(&a.site)?;
    print!("{}", crate::serve::modbus::markdown(&crate::serve::modbus::targets_of(&site)));
    Ok(())
}
