//! Reading `[[tenants]]`: each tenant's name, API keys, adapter patterns and quota, checked one
//! by one (naming `tenants[i].keys[j]` and the like) and then across tenants (names and keys
//! unique). Tenants come from the file only; keys do not belong in an environment variable list.

use std::collections::BTreeMap;

use toml::{Table, Value};

use crate::ConfigError;
use crate::TenantSettings;
use crate::quota::{self, read_tenant_quota};
use crate::read::{Raw, TENANTS, type_name};
use crate::rules::{name_rule, pattern_rule, secret_rule};

const FIELDS: &[&str] = &[
    "name",
    "keys",
    "adapters",
    quota::FIELDS[0],
    quota::FIELDS[1],
    quota::FIELDS[2],
];

/// Reads and checks the `tenants` value of the file (`None`: no tenants, the server is open).
pub(crate) fn read_tenants(value: Option<&Value>) -> Result<Vec<TenantSettings>, ConfigError> {
    let Some(value) = value else {
        return Ok(Vec::new());
    };
    let Value::Array(items) = value else {
        return Err(ConfigError::invalid(
            TENANTS,
            Raw::Toml(value).shown(),
            format!(
                "expected an array of tables ([[tenants]] sections), found {}",
                type_name(value)
            ),
        ));
    };
    let mut tenants = Vec::with_capacity(items.len());
    for (i, item) in items.iter().enumerate() {
        let at = format!("{TENANTS}[{i}]");
        let Value::Table(table) = item else {
            return Err(ConfigError::invalid(
                at,
                Raw::Toml(item).shown(),
                format!("expected a table, found {}", type_name(item)),
            ));
        };
        tenants.push(read_tenant(&at, table)?);
    }
    check_unique(&tenants)?;
    Ok(tenants)
}

fn read_tenant(at: &str, table: &Table) -> Result<TenantSettings, ConfigError> {
    if let Some(field) = table.keys().find(|k| !FIELDS.contains(&k.as_str())) {
        return Err(ConfigError::Unknown {
            key: format!("{at}.{field}"),
            hint: format!("; a tenant has {}", FIELDS.join(", ")),
        });
    }
    let name = match table.get("name") {
        Some(Value::String(name)) => name.clone(),
        Some(other) => {
            return Err(ConfigError::invalid(
                format!("{at}.name"),
                Raw::Toml(other).shown(),
                format!("expected a string, found {}", type_name(other)),
            ));
        }
        None => {
            return Err(ConfigError::Missing {
                key: format!("{at}.name"),
                rule: "every tenant needs a name".to_owned(),
            });
        }
    };
    if let Some(rule) = name_rule(&name) {
        return Err(ConfigError::invalid(format!("{at}.name"), name, rule));
    }

    let keys = strings(at, "keys", table, true)?;
    if keys.is_empty() {
        return Err(ConfigError::Missing {
            key: format!("{at}.keys"),
            rule: format!("tenant {name:?} needs at least one API key"),
        });
    }
    for (j, key) in keys.iter().enumerate() {
        if let Some(rule) = secret_rule(key) {
            return Err(ConfigError::secret(format!("{at}.keys[{j}]"), rule));
        }
    }

    // No patterns is allowed: such a tenant may use the base model only.
    let adapters = strings(at, "adapters", table, false)?;
    for (j, pattern) in adapters.iter().enumerate() {
        if let Some(rule) = pattern_rule(pattern) {
            return Err(ConfigError::invalid(
                format!("{at}.adapters[{j}]"),
                pattern.as_str(),
                rule,
            ));
        }
    }
    Ok(TenantSettings {
        name,
        keys,
        adapters,
        quota: read_tenant_quota(at, table)?,
    })
}

/// An array of strings under `field`, empty when absent. With `secret`, no refusal repeats a
/// value.
fn strings(at: &str, field: &str, table: &Table, secret: bool) -> Result<Vec<String>, ConfigError> {
    let refuse = |key: String, value: &Value, rule: String| {
        if secret {
            ConfigError::secret(key, rule)
        } else {
            ConfigError::invalid(key, Raw::Toml(value).shown(), rule)
        }
    };
    let Some(value) = table.get(field) else {
        return Ok(Vec::new());
    };
    let Value::Array(items) = value else {
        return Err(refuse(
            format!("{at}.{field}"),
            value,
            format!("expected an array of strings, found {}", type_name(value)),
        ));
    };
    items
        .iter()
        .enumerate()
        .map(|(j, item)| match item {
            Value::String(s) => Ok(s.clone()),
            other => Err(refuse(
                format!("{at}.{field}[{j}]"),
                other,
                format!("expected a string, found {}", type_name(other)),
            )),
        })
        .collect()
}

/// Tenant names are unique, and so is every key, across all tenants: a key that two tenants
/// share could not say which tenant is calling.
fn check_unique(tenants: &[TenantSettings]) -> Result<(), ConfigError> {
    let mut names: BTreeMap<&str, usize> = BTreeMap::new();
    let mut keys: BTreeMap<&str, String> = BTreeMap::new();
    for (i, tenant) in tenants.iter().enumerate() {
        if let Some(first) = names.insert(&tenant.name, i) {
            return Err(ConfigError::invalid(
                format!("{TENANTS}[{i}].name"),
                tenant.name.as_str(),
                format!("{TENANTS}[{first}] already has this name; tenant names must be unique"),
            ));
        }
        for (j, key) in tenant.keys.iter().enumerate() {
            let here = format!("{TENANTS}[{i}].keys[{j}]");
            if let Some(first) = keys.get(key.as_str()) {
                return Err(ConfigError::secret(
                    here,
                    format!("is the same key as `{first}`; every API key must be unique"),
                ));
            }
            keys.insert(key, here);
        }
    }
    Ok(())
}
