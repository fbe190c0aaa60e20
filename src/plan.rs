//! The run plan: for every unit, fresh or stale, and why — pure data, decided before anything runs.
//!
//! Freshness is decided by the key alone (is an intact object stored under it?). The *reasons*
//! for a stale unit are found by comparing its current fingerprint with its [`Previous`] state:
//! the unit as the last run of this pipeline recorded it (the output folder's manifest, else the
//! last record of the same stage × subject, which every run refreshes, cached units included).
//! Never the state of whichever variant last computed the unit: after a sweep or a `--set` run
//! the cache holds several, and the user compares with the run they made last.
//!
//! The comparison lists every root cause, in a fixed order: op version, every changed param (in
//! sorted order, old → new), then for a changed recording its changed reading settings and
//! files. Root causes are kept apart from cascades: a unit whose only difference is an input key
//! of a stale upstream unit is [`Reason::Upstream`] (one per such input stage). When nothing
//! explains the difference (no record, pruned cache) the reason is [`Reason::NotCached`]. Every
//! path fails toward recomputing.

use std::fmt;

use serde::{Deserialize, Serialize};
use serde_json::Value;

use crate::key::{canonical_json, Fingerprint};
use crate::manifest::UnitRecord;
use crate::pipeline::SOURCE;

/// Why a unit must run.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "reason", rename_all = "snake_case")]
pub enum Reason {
    /// The op's version changed.
    OpVersionChanged {
        /// The version of the last computation.
        old: u32,
        /// The version now.
        new: u32,
    },
    /// A param changed.
    ParamChanged {
        /// Dotted path of the param.
        name: String,
        /// Its old value (canonical JSON; `absent` when it was not there).
        old: String,
        /// Its new value.
        new: String,
    },
    /// A setting of how the subject's recording is read changed (`data.events`,
    /// `data.channels`, `data.rate`, ...).
    ReadingChanged {
        /// The setting, as the pipeline file names it (`data.events`).
        setting: String,
        /// Its old value (canonical JSON; `absent` when it was not there).
        old: String,
        /// Its new value.
        new: String,
    },
    /// A file of the subject's recording changed.
    InputFileChanged {
        /// The file.
        path: String,
    },
    /// An upstream stage is stale (a cascade, not a root cause).
    Upstream {
        /// The upstream stage.
        stage: String,
    },
    /// Nothing is cached under the key and no earlier record explains why.
    NotCached,
    /// The cached object is damaged.
    Damaged {
        /// What is wrong with it.
        why: String,
    },
    /// A `cache: false` unit whose consumer must run needs its values recomputed.
    NotStored {
        /// The consumer.
        consumer: String,
    },
}

impl Reason {
    /// True for reasons that are consequences of another unit's change.
    pub fn is_cascade(&self) -> bool {
        matches!(self, Reason::Upstream { .. } | Reason::NotStored { .. })
    }
}

impl fmt::Display for Reason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Reason::OpVersionChanged { old, new } => write!(f, "op version changed: {old} → {new}"),
            Reason::ParamChanged { name, old, new } => {
                write!(f, "param {name} changed: {old} → {new}")
            }
            Reason::ReadingChanged { setting, old, new } => {
                write!(f, "{setting} changed: {old} → {new}")
            }
            Reason::InputFileChanged { path } => write!(f, "input file changed: {path}"),
            Reason::Upstream { stage } => write!(f, "upstream {stage} changed"),
            Reason::NotCached => write!(f, "not cached"),
            Reason::Damaged { why } => write!(f, "cached object damaged: {why}"),
            Reason::NotStored { consumer } => {
                write!(f, "not kept in the cache; {consumer} needs it")
            }
        }
    }
}

/// Fresh or stale.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "status", content = "reasons", rename_all = "snake_case")]
pub enum Status {
    /// An intact result is cached under the unit's key.
    Fresh,
    /// The unit must run, for these reasons (at least one; root causes, or else cascades).
    Stale(Vec<Reason>),
}

/// A unit as the last run of its pipeline left it: what its reasons are found against.
#[derive(Clone, Debug, PartialEq)]
pub struct Previous {
    /// The op's version then.
    pub op_version: u32,
    /// The effective params then.
    pub params: Value,
    /// The keys of its inputs then, in order.
    pub inputs: Vec<String>,
}

impl From<&Fingerprint> for Previous {
    fn from(fingerprint: &Fingerprint) -> Previous {
        Previous {
            op_version: fingerprint.op_version,
            params: fingerprint.params.clone(),
            inputs: fingerprint.inputs.iter().map(|i| i.key.clone()).collect(),
        }
    }
}

impl From<&UnitRecord> for Previous {
    fn from(unit: &UnitRecord) -> Previous {
        Previous {
            op_version: unit.op_version,
            params: unit.params.clone(),
            inputs: unit.inputs.clone(),
        }
    }
}

/// What the store holds for a unit's key.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Stored {
    /// An object (or, for `cache: false`, its record).
    Present,
    /// Nothing.
    Absent,
    /// Something untrustworthy.
    Damaged(String),
}

/// Everything the planner knows about one unit.
#[derive(Clone, Debug, PartialEq)]
pub struct UnitFacts {
    /// Stage name.
    pub stage: String,
    /// Subject, `None` for group units.
    pub subject: Option<String>,
    /// The current fingerprint.
    pub fingerprint: Fingerprint,
    /// What the store holds under its key.
    pub stored: Stored,
    /// The unit as the last run of the pipeline left it, if known.
    pub last: Option<Previous>,
    /// Files of the subject's recording whose hash differs from the one of that run.
    pub changed_files: Vec<String>,
    /// The settings of how the subject's recording is read (`data.events`, ...) whose value
    /// differs from the last recorded one: name, old and new value (canonical JSON), each.
    pub changed_reading: Vec<(String, String, String)>,
    /// Indices (into the same list) of the units consuming this one.
    pub consumers: Vec<usize>,
    /// False for `cache: false` stages.
    pub cache: bool,
}

/// One line of the plan.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct UnitPlan {
    /// Stage name.
    pub stage: String,
    /// Subject.
    pub subject: Option<String>,
    /// The unit's key.
    pub key: String,
    /// Fresh or stale, and why.
    #[serde(flatten)]
    pub status: Status,
}

impl UnitPlan {
    /// `fresh`, or the reasons the unit is stale (joined by `; `).
    pub fn status_line(&self) -> String {
        match &self.status {
            Status::Fresh => "fresh".into(),
            Status::Stale(reasons) => reasons
                .iter()
                .map(ToString::to_string)
                .collect::<Vec<_>>()
                .join("; "),
        }
    }
}

/// The plan: one entry per unit, in the units' order.
#[derive(Clone, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Plan {
    /// The units.
    pub units: Vec<UnitPlan>,
}

impl Plan {
    /// Decide every unit (units must come in topological order).
    pub fn decide(facts: &[UnitFacts]) -> Plan {
        let mut statuses: Vec<Status> = facts.iter().map(own_status).collect();
        // A unit without a stored value whose consumer runs must run as well: walk backwards so
        // that chains of `cache: false` stages propagate.
        for i in (0..facts.len()).rev() {
            if facts[i].cache || statuses[i] != Status::Fresh {
                continue;
            }
            let stale_consumer = facts[i]
                .consumers
                .iter()
                .find(|&&c| statuses[c] != Status::Fresh);
            if let Some(&c) = stale_consumer {
                statuses[i] = Status::Stale(vec![Reason::NotStored {
                    consumer: facts[c].stage.clone(),
                }]);
            }
        }
        let units = facts
            .iter()
            .zip(statuses)
            .map(|(f, status)| UnitPlan {
                stage: f.stage.clone(),
                subject: f.subject.clone(),
                key: f.fingerprint.key(),
                status,
            })
            .collect();
        Plan { units }
    }

    /// Number of stale units.
    pub fn stale_count(&self) -> usize {
        self.units
            .iter()
            .filter(|u| u.status != Status::Fresh)
            .count()
    }
}

impl Reason {
    /// The reason as `plan --json` prints it: `{"kind": ..., ...}` with the old and new values of
    /// a changed param as JSON values (`null` where the param was absent).
    pub fn to_json(&self) -> Value {
        let value = |text: &str| serde_json::from_str(text).unwrap_or(Value::Null);
        match self {
            Reason::OpVersionChanged { old, new } => {
                serde_json::json!({"kind": "op_version", "old": old, "new": new})
            }
            Reason::ParamChanged { name, old, new } => serde_json::json!({
                "kind": "param", "param": name, "old": value(old), "new": value(new)
            }),
            Reason::ReadingChanged { setting, old, new } => serde_json::json!({
                "kind": "reading", "setting": setting, "old": value(old), "new": value(new)
            }),
            Reason::InputFileChanged { path } => {
                serde_json::json!({"kind": "input_file", "path": path})
            }
            Reason::Upstream { stage } => serde_json::json!({"kind": "upstream", "stage": stage}),
            Reason::NotCached => serde_json::json!({"kind": "not_cached"}),
            Reason::Damaged { why } => serde_json::json!({"kind": "damaged", "why": why}),
            Reason::NotStored { consumer } => {
                serde_json::json!({"kind": "not_stored", "consumer": consumer})
            }
        }
    }
}

impl Plan {
    /// The plan as data (`plan --json`, DESIGN §7): one entry per unit with its stage, subject,
    /// key, status, reasons (empty when fresh) and `recipes[u]`, plus the count of stale units.
    pub fn to_json(&self, recipes: &[crate::recipe::Recipe]) -> Value {
        let units: Vec<Value> = self
            .units
            .iter()
            .zip(recipes)
            .map(|(u, recipe)| {
                let (status, reasons) = match &u.status {
                    Status::Fresh => ("fresh", Vec::new()),
                    Status::Stale(reasons) => ("stale", reasons.iter().map(Reason::to_json).collect()),
                };
                serde_json::json!({
                    "stage": u.stage,
                    "subject": u.subject,
                    "key": u.key,
                    "status": status,
                    "cascade": matches!(&u.status, Status::Stale(r) if r.iter().all(Reason::is_cascade)),
                    "reasons": reasons,
                    "recipe": recipe,
                })
            })
            .collect();
        serde_json::json!({
            "format": "phasewise-plan",
            "format_version": 1,
            "stale": self.stale_count(),
            "units": units,
        })
    }
}

fn own_status(facts: &UnitFacts) -> Status {
    match &facts.stored {
        Stored::Present => Status::Fresh,
        Stored::Damaged(why) => Status::Stale(vec![Reason::Damaged { why: why.clone() }]),
        Stored::Absent => Status::Stale(explain(facts)),
    }
}

/// Why the current fingerprint differs from the previous state: every root cause (op version,
/// each changed param, the recording's changed reading settings and files), or, when there is
/// none, the upstream stages whose keys changed; [`Reason::NotCached`] when nothing explains it.
pub fn explain(facts: &UnitFacts) -> Vec<Reason> {
    let Some(last) = &facts.last else {
        return vec![Reason::NotCached];
    };
    let now = &facts.fingerprint;
    let mut roots = Vec::new();
    if last.op_version != now.op_version {
        roots.push(Reason::OpVersionChanged {
            old: last.op_version,
            new: now.op_version,
        });
    }
    roots.extend(
        differences("", &last.params, &now.params)
            .into_iter()
            .map(|(name, old, new)| Reason::ParamChanged { name, old, new }),
    );
    let mut upstream = Vec::new();
    let mut recording = None;
    for (i, input) in now.inputs.iter().enumerate() {
        if last.inputs.get(i) == Some(&input.key) {
            continue;
        }
        if input.stage == SOURCE {
            recording.get_or_insert(input.subject.as_deref().unwrap_or("?"));
            continue;
        }
        let reason = Reason::Upstream {
            stage: input.stage.clone(),
        };
        if !upstream.contains(&reason) {
            upstream.push(reason);
        }
    }
    if let Some(subject) = recording {
        let settings = facts.changed_reading.iter().cloned();
        roots.extend(settings.map(|(setting, old, new)| Reason::ReadingChanged {
            setting,
            old,
            new,
        }));
        let files = facts.changed_files.iter().cloned();
        roots.extend(files.map(|path| Reason::InputFileChanged { path }));
        if facts.changed_reading.is_empty() && facts.changed_files.is_empty() {
            roots.push(Reason::InputFileChanged {
                path: format!("the recording of {subject}"),
            });
        }
    }
    if !roots.is_empty() {
        roots
    } else if !upstream.is_empty() {
        upstream
    } else {
        vec![Reason::NotCached]
    }
}

/// Every leaf (in sorted key order) where two param trees differ: its dotted path, old and new
/// value (canonical JSON; `absent` where it is not there). Lists are leaves.
pub(crate) fn differences(path: &str, old: &Value, new: &Value) -> Vec<(String, String, String)> {
    let mut found = Vec::new();
    collect_differences(path, old, new, &mut found);
    found
}

fn collect_differences(
    path: &str,
    old: &Value,
    new: &Value,
    found: &mut Vec<(String, String, String)>,
) {
    if canonical_json(old) == canonical_json(new) {
        return;
    }
    let join = |k: &str| {
        if path.is_empty() {
            k.to_string()
        } else {
            format!("{path}.{k}")
        }
    };
    if let (Value::Object(a), Value::Object(b)) = (old, new) {
        let mut keys: Vec<&String> = a.keys().chain(b.keys()).collect();
        keys.sort();
        keys.dedup();
        for k in keys {
            match (a.get(k), b.get(k)) {
                (Some(x), Some(y)) => collect_differences(&join(k), x, y, found),
                (x, y) => found.push((join(k), show(x), show(y))),
            }
        }
        return;
    }
    let name = if path.is_empty() {
        "(params)".to_string()
    } else {
        path.to_string()
    };
    found.push((name, canonical_json(old), canonical_json(new)));
}

fn show(value: Option<&Value>) -> String {
    value.map_or_else(|| "absent".to_string(), canonical_json)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::key::InputKey;
    use serde_json::json;

    fn fp(params: Value, input_key: &str, input_stage: &str) -> Fingerprint {
        Fingerprint {
            op: "scale".into(),
            op_version: 1,
            params,
            inputs: vec![InputKey {
                stage: input_stage.into(),
                subject: Some("01".into()),
                key: input_key.into(),
            }],
            subject: Some("01".into()),
        }
    }

    fn facts(
        stage: &str,
        now: Fingerprint,
        last: Option<Fingerprint>,
        stored: Stored,
    ) -> UnitFacts {
        UnitFacts {
            stage: stage.into(),
            subject: Some("01".into()),
            fingerprint: now,
            stored,
            last: last.as_ref().map(Previous::from),
            changed_files: vec![],
            changed_reading: vec![],
            consumers: vec![],
            cache: true,
        }
    }

    #[test]
    fn a_param_change_is_the_root_and_its_consumer_a_cascade() {
        let tf_last = fp(json!({"cycles": 4, "freqs": [4, 8]}), "r", SOURCE);
        let tf_now = fp(json!({"cycles": 6, "freqs": [4, 8]}), "r", SOURCE);
        let sync_last = fp(json!({}), &tf_last.key(), "tf");
        let sync_now = fp(json!({}), &tf_now.key(), "tf");
        let plan = Plan::decide(&[
            facts("tf", tf_now, Some(tf_last), Stored::Absent),
            facts("sync", sync_now, Some(sync_last), Stored::Absent),
        ]);
        assert_eq!(
            plan.units[0].status,
            Status::Stale(vec![Reason::ParamChanged {
                name: "cycles".into(),
                old: "4".into(),
                new: "6".into()
            }])
        );
        assert_eq!(
            plan.units[1].status,
            Status::Stale(vec![Reason::Upstream { stage: "tf".into() }])
        );
        assert_eq!(plan.units[0].status_line(), "param cycles changed: 4 → 6");
    }

    #[test]
    fn version_file_missing_record_and_damage_are_told_apart() {
        let last = fp(json!({"a": 1}), "r1", SOURCE);
        let mut newer = last.clone();
        newer.op_version = 2;
        assert_eq!(
            explain(&facts("s", newer, Some(last.clone()), Stored::Absent)),
            vec![Reason::OpVersionChanged { old: 1, new: 2 }]
        );
        let mut changed = facts(
            "s",
            fp(json!({"a": 1}), "r2", SOURCE),
            Some(last.clone()),
            Stored::Absent,
        );
        changed.changed_files = vec!["sub-01/eeg/x.edf".into()];
        assert_eq!(
            explain(&changed),
            vec![Reason::InputFileChanged {
                path: "sub-01/eeg/x.edf".into()
            }]
        );
        assert_eq!(
            explain(&facts("s", last.clone(), None, Stored::Absent)),
            vec![Reason::NotCached]
        );
        let plan = Plan::decide(&[facts(
            "s",
            last.clone(),
            Some(last),
            Stored::Damaged("x".into()),
        )]);
        assert_eq!(
            plan.units[0].status,
            Status::Stale(vec![Reason::Damaged { why: "x".into() }])
        );
    }

    #[test]
    fn added_params_and_nested_changes_name_their_path() {
        let old = json!({"freqs": {"from": 3, "to": 30}});
        let new = json!({"freqs": {"from": 3, "to": 40}, "stride": 2});
        assert_eq!(
            differences("", &old, &new),
            vec![
                ("freqs.to".into(), "30".into(), "40".into()),
                ("stride".into(), "absent".into(), "2".into())
            ]
        );
        let new = json!({"freqs": {"from": 3.0, "to": 30}, "stride": 2});
        assert_eq!(
            differences("", &old, &new),
            vec![("stride".into(), "absent".into(), "2".into())]
        );
        assert_eq!(differences("", &old, &old), vec![]);
    }

    #[test]
    fn every_changed_param_is_a_reason_and_a_cascade_is_told_only_without_one() {
        let last = fp(json!({"method": "average"}), "r", "line");
        let now = fp(
            json!({"method": "channels", "channels": ["O1"]}),
            "r2",
            "line",
        );
        let both = vec![
            Reason::ParamChanged {
                name: "channels".into(),
                old: "absent".into(),
                new: "[\"O1\"]".into(),
            },
            Reason::ParamChanged {
                name: "method".into(),
                old: "\"average\"".into(),
                new: "\"channels\"".into(),
            },
        ];
        assert_eq!(
            explain(&facts("s", now, Some(last.clone()), Stored::Absent)),
            both
        );
        let cascade = fp(json!({"method": "average"}), "r2", "line");
        let plan = Plan::decide(&[facts("s", cascade, Some(last), Stored::Absent)]);
        assert_eq!(
            plan.units[0].status,
            Status::Stale(vec![Reason::Upstream {
                stage: "line".into()
            }])
        );
        assert_eq!(plan.units[0].status_line(), "upstream line changed");
        let json = Plan {
            units: vec![UnitPlan {
                stage: "s".into(),
                subject: None,
                key: "k".into(),
                status: Status::Stale(both),
            }],
        }
        .to_json(&[crate::recipe::Recipe {
            how: crate::recipe::How::Whole,
            stored: true,
            prepared_for: vec![],
            prepared_for_units: vec![],
            unstored_by_policy: false,
            provisional: false,
            fallback: None,
        }]);
        assert_eq!(
            json["units"][0]["reasons"],
            json!([
                {"kind": "param", "param": "channels", "old": null, "new": ["O1"]},
                {"kind": "param", "param": "method", "old": "average", "new": "channels"}
            ])
        );
    }

    #[test]
    fn an_unstored_unit_runs_when_its_consumer_does() {
        let a = fp(json!({}), "r", SOURCE);
        let b = fp(json!({"k": 1}), &a.key(), "a");
        let mut first = facts("a", a, None, Stored::Present);
        first.cache = false;
        first.consumers = vec![1];
        let plan = Plan::decide(&[first, facts("b", b, None, Stored::Absent)]);
        assert_eq!(
            plan.units[0].status,
            Status::Stale(vec![Reason::NotStored {
                consumer: "b".into()
            }])
        );
    }
}
