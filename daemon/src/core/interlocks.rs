//! Safety interlocks: evaluated on every tick, separate from the PID code.
//!
//! [`Interlocks::evaluate`] looks at one tick's readings and the controller's commands
//! and returns the powers that may actually go out, whether the stage must go to its
//! safe state, and the alarms that changed. Each condition trips after it has held for
//! its configured number of consecutive ticks; its alarm then stays *latched* — listed,
//! even once the condition clears — until a person acknowledges it.
//!
//! Actions, strongest first: `safe` (every heater to zero, mode to `off` — the pipeline
//! switches the mode), `hold` (heater outputs frozen at the last applied values while the
//! condition holds), `limit` (the offending heater to zero for over-temperature, clamped
//! to its maximum for over-power, all heaters scaled to the total for total power; for
//! conditions with nothing to clamp, the same as hold).
//!
//! Pure code: time comes in as an argument; no I/O. These interlocks complement, and
//! never replace, a hardware thermal cut-off on every heater.

use stilt_config::{Config, InterlockAction, InterlockRule, Limits, Mode};

/// One tick's view for the interlocks.
#[derive(Debug, Clone, PartialEq)]
pub struct InterlockInputs<'a> {
    /// Run time, s.
    pub t_s: f64,
    /// Mode during the tick.
    pub mode: Mode,
    /// Each leg's usable temperature, °C.
    pub leg_temp_c: &'a [Option<f64>],
    /// The tick's usable mean tilt, µrad.
    pub tilt_urad: Option<[f64; 2]>,
    /// Some tilt reading this tick was outside the instrument's or the configured range.
    pub tilt_out_of_range: bool,
    /// What the controller commands this tick, W.
    pub commanded_w: &'a [f64],
    /// What the supply reads back (of the previous tick's command), W.
    pub readback_w: &'a [Option<f64>],
    /// What was applied at the previous tick, W.
    pub last_applied_w: &'a [f64],
    /// The loop was late for this tick.
    pub overrun: bool,
}

/// An alarm's life.
#[derive(Debug, Clone, PartialEq)]
pub struct Alarm {
    /// Stable id: `interlock` or `interlock:leg`.
    pub id: String,
    /// What a person reads.
    pub message: String,
    /// Run time it tripped, s.
    pub since_s: f64,
    /// The condition holds now.
    pub active: bool,
    /// The action it takes while active.
    pub action: InterlockAction,
    /// Who acknowledged it, if anyone (it disappears once acknowledged and inactive).
    pub acknowledged_by: Option<String>,
}

/// A change for the events.
#[derive(Debug, Clone, PartialEq)]
pub enum AlarmChange {
    /// Tripped: the alarm and its action.
    Raised(Alarm),
    /// The condition no longer holds (the alarm stays latched until acknowledged).
    Cleared(String),
}

/// The interlocks' decision for one tick.
#[derive(Debug, Clone, PartialEq)]
pub struct Verdict {
    /// Powers allowed out, W.
    pub power_w: Vec<f64>,
    /// The stage must go to its safe state (mode `off`).
    pub safe: bool,
    /// Outputs differ from the controller's commands.
    pub overridden: bool,
    /// Alarms raised or cleared this tick.
    pub changes: Vec<AlarmChange>,
}

struct Condition {
    id: String,
    message: String,
    rule: InterlockRule,
    /// The leg it is about, for `limit`.
    leg: Option<usize>,
    kind: Kind,
}

#[derive(Clone, Copy, PartialEq)]
enum Kind {
    OverTemp,
    OverPower,
    TotalPower,
    Other,
}

/// Interlock state across ticks.
#[derive(Debug, Clone)]
pub struct Interlocks {
    cfg: stilt_config::Interlocks,
    limits: Limits,
    max_power_w: Vec<f64>,
    names: Vec<String>,
    /// id → consecutive ticks the condition has held.
    counts: std::collections::BTreeMap<String, u32>,
    alarms: Vec<Alarm>,
}

impl Interlocks {
    /// The interlocks of a validated configuration.
    pub fn new(cfg: &Config) -> Self {
        Interlocks {
            cfg: cfg.interlocks.clone(),
            limits: cfg.limits.clone(),
            max_power_w: cfg.legs.iter().map(|l| l.heater_max_power_w).collect(),
            names: cfg.legs.iter().map(|l| l.name.clone()).collect(),
            counts: Default::default(),
            alarms: Vec::new(),
        }
    }

    /// Active and latched alarms, oldest first.
    pub fn alarms(&self) -> &[Alarm] {
        &self.alarms
    }

    /// Whether a tripped alarm with this action is active.
    pub fn any_active(&self, action: InterlockAction) -> bool {
        self.alarms.iter().any(|a| a.active && a.action == action)
    }

    fn conditions(&self, i: &InterlockInputs<'_>) -> Vec<Condition> {
        let c = &self.cfg;
        let mut out = Vec::new();
        let mut push =
            |id: String, message: String, rule: InterlockRule, leg: Option<usize>, kind: Kind| {
                out.push(Condition {
                    id,
                    message,
                    rule,
                    leg,
                    kind,
                });
            };
        let n = self.names.len();
        for k in 0..n {
            let name = &self.names[k];
            if let Some(t) = i.leg_temp_c.get(k).copied().flatten() {
                if t > self.limits.max_leg_temp_c {
                    push(
                        format!("leg_over_temperature:{name}"),
                        format!(
                            "leg {name} at {t:.3} °C, above limits.max_leg_temp_c = {} °C",
                            self.limits.max_leg_temp_c
                        ),
                        c.leg_over_temperature,
                        Some(k),
                        Kind::OverTemp,
                    );
                }
            }
            if let Some(p) = i.readback_w.get(k).copied().flatten() {
                let max = self.max_power_w[k] * c.heater_over_power_margin_ratio;
                if p > max {
                    push(
                        format!("heater_over_power:{name}"),
                        format!(
                            "heater {name} reads back {p:.3} W, above {max:.3} W (maximum × margin)"
                        ),
                        c.heater_over_power,
                        Some(k),
                        Kind::OverPower,
                    );
                }
                let applied = i.last_applied_w.get(k).copied().unwrap_or(0.0);
                if applied >= c.heater_open_min_power_w && p < c.heater_open_min_ratio * applied {
                    push(
                        format!("heater_open_circuit:{name}"),
                        format!(
                            "heater {name} commanded {applied:.3} W reads back {p:.3} W: open circuit?"
                        ),
                        c.heater_open_circuit,
                        Some(k),
                        Kind::Other,
                    );
                }
            }
        }
        let commanded: f64 = i.commanded_w.iter().sum();
        let read: f64 = i.readback_w.iter().map(|p| p.unwrap_or(0.0)).sum();
        let total = commanded.max(read);
        if total > self.limits.max_total_power_w + 1e-9 {
            push(
                "total_power".into(),
                format!(
                    "total heater power {total:.3} W above limits.max_total_power_w = {} W",
                    self.limits.max_total_power_w
                ),
                c.total_power,
                None,
                Kind::TotalPower,
            );
        }
        let needs_temps = matches!(i.mode, Mode::Temperature | Mode::Level);
        if needs_temps {
            for k in 0..n {
                if i.leg_temp_c.get(k).copied().flatten().is_none() {
                    push(
                        format!("sensor_stale:{}", self.names[k]),
                        format!("no usable temperature for leg {}", self.names[k]),
                        c.sensor_stale,
                        Some(k),
                        Kind::Other,
                    );
                }
            }
        }
        if i.mode == Mode::Level && i.tilt_urad.is_none() && !i.tilt_out_of_range {
            push(
                "sensor_stale:tilt".into(),
                "no usable tilt reading".into(),
                c.sensor_stale,
                None,
                Kind::Other,
            );
        }
        let range = self.limits.tilt_range_urad;
        if i.tilt_out_of_range
            || i.tilt_urad
                .is_some_and(|t| t[0].abs() > range || t[1].abs() > range)
        {
            push(
                "tilt_out_of_range".into(),
                format!("tilt outside ±{range} µrad (limits.tilt_range_urad)"),
                c.tilt_out_of_range,
                None,
                Kind::Other,
            );
        }
        let temps: Vec<f64> = i.leg_temp_c.iter().flatten().copied().collect();
        if temps.len() >= 3 {
            let mut s = temps.clone();
            s.sort_by(f64::total_cmp);
            let median = s[s.len() / 2];
            for k in 0..n {
                if let Some(t) = i.leg_temp_c.get(k).copied().flatten() {
                    if (t - median).abs() > c.thermometer_max_spread_k {
                        push(
                            format!("thermometer_disagreement:{}", self.names[k]),
                            format!(
                                "leg {} reads {t:.3} °C, {:.3} K from the legs' median",
                                self.names[k],
                                t - median
                            ),
                            c.thermometer_disagreement,
                            Some(k),
                            Kind::Other,
                        );
                    }
                }
            }
        }
        if i.overrun {
            push(
                "loop_overrun".into(),
                "the control loop was late for its period".into(),
                c.loop_overrun,
                None,
                Kind::Other,
            );
        }
        out
    }

    /// Evaluates one tick.
    pub fn evaluate(&mut self, i: &InterlockInputs<'_>) -> Verdict {
        let conds = self.conditions(i);
        let mut changes = Vec::new();
        // Count consecutive ticks; forget conditions that no longer hold.
        let holding: std::collections::BTreeSet<&str> =
            conds.iter().map(|c| c.id.as_str()).collect();
        self.counts.retain(|id, _| holding.contains(id.as_str()));
        for a in &mut self.alarms {
            if a.active && !holding.contains(a.id.as_str()) {
                a.active = false;
                changes.push(AlarmChange::Cleared(a.id.clone()));
            }
        }
        self.alarms
            .retain(|a| a.active || a.acknowledged_by.is_none());
        let mut tripped: Vec<&Condition> = Vec::new();
        for c in &conds {
            let n = self.counts.entry(c.id.clone()).or_insert(0);
            *n = n.saturating_add(1);
            if *n >= c.rule.after_ticks {
                tripped.push(c);
                match self.alarms.iter_mut().find(|a| a.id == c.id) {
                    Some(a) if a.active => {}
                    Some(a) => {
                        a.active = true;
                        a.acknowledged_by = None;
                        a.since_s = i.t_s;
                        a.message = c.message.clone();
                        changes.push(AlarmChange::Raised(a.clone()));
                    }
                    None => {
                        let a = Alarm {
                            id: c.id.clone(),
                            message: c.message.clone(),
                            since_s: i.t_s,
                            active: true,
                            action: c.rule.action,
                            acknowledged_by: None,
                        };
                        changes.push(AlarmChange::Raised(a.clone()));
                        self.alarms.push(a);
                    }
                }
            }
        }
        // Actions, strongest first.
        let n = i.commanded_w.len();
        let mut power: Vec<f64> = i.commanded_w.to_vec();
        let safe = tripped
            .iter()
            .any(|c| c.rule.action == InterlockAction::Safe);
        let hold = tripped.iter().any(|c| {
            c.rule.action == InterlockAction::Hold
                || (c.rule.action == InterlockAction::Limit && c.kind == Kind::Other)
        });
        for c in tripped
            .iter()
            .filter(|c| c.rule.action == InterlockAction::Limit)
        {
            match (c.kind, c.leg) {
                (Kind::OverTemp, Some(k)) => power[k] = 0.0,
                (Kind::OverPower, Some(k)) => power[k] = power[k].min(self.max_power_w[k]),
                _ => {}
            }
        }
        if tripped
            .iter()
            .any(|c| c.rule.action == InterlockAction::Limit && c.kind == Kind::TotalPower)
        {
            // Scale by what is really delivered where the supply reads back more than asked.
            let commanded: f64 = power.iter().sum();
            let read: f64 = i.readback_w.iter().map(|p| p.unwrap_or(0.0)).sum();
            let applied: f64 = i.last_applied_w.iter().sum();
            let gain = if applied > 0.0 && read > applied {
                read / applied
            } else {
                1.0
            };
            let total = commanded * gain;
            if total > self.limits.max_total_power_w && total > 0.0 {
                let s = self.limits.max_total_power_w / total;
                power.iter_mut().for_each(|p| *p *= s);
            }
        }
        if hold {
            power = (0..n)
                .map(|k| i.last_applied_w.get(k).copied().unwrap_or(0.0))
                .collect();
        }
        if safe {
            power = vec![0.0; n];
        }
        // Whatever happened above, never outside 0 … max.
        for (k, p) in power.iter_mut().enumerate() {
            *p = if p.is_finite() {
                p.clamp(0.0, self.max_power_w[k])
            } else {
                0.0
            };
        }
        let overridden = power.iter().zip(i.commanded_w).any(|(a, b)| a != b);
        Verdict {
            power_w: power,
            safe,
            overridden,
            changes,
        }
    }

    /// Acknowledges one alarm (by id) or all. Inactive alarms disappear; active ones stay
    /// listed as acknowledged until their condition clears. Returns the ids acknowledged.
    pub fn acknowledge(&mut self, id: Option<&str>, who: &str) -> Result<Vec<String>, String> {
        let mut done = Vec::new();
        for a in &mut self.alarms {
            if id.is_none_or(|x| x == a.id) && a.acknowledged_by.is_none() {
                a.acknowledged_by = Some(who.to_string());
                done.push(a.id.clone());
            }
        }
        if let Some(x) = id {
            if done.is_empty() && !self.alarms.iter().any(|a| a.id == x) {
                return Err(format!("no alarm `{x}` is active or latched"));
            }
        }
        self.alarms
            .retain(|a| a.active || a.acknowledged_by.is_none());
        Ok(done)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cfg() -> Config {
        stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap()
    }

    struct T {
        temps: Vec<Option<f64>>,
        tilt: Option<[f64; 2]>,
        oor: bool,
        cmd: Vec<f64>,
        rb: Vec<Option<f64>>,
        last: Vec<f64>,
        overrun: bool,
        mode: Mode,
    }

    impl T {
        fn ok() -> Self {
            T {
                temps: vec![Some(24.0); 3],
                tilt: Some([0.0, 0.0]),
                oor: false,
                cmd: vec![1.0; 3],
                rb: vec![Some(1.0); 3],
                last: vec![1.0; 3],
                overrun: false,
                mode: Mode::Level,
            }
        }
        fn eval(&self, il: &mut Interlocks, t: f64) -> Verdict {
            il.evaluate(&InterlockInputs {
                t_s: t,
                mode: self.mode,
                leg_temp_c: &self.temps,
                tilt_urad: self.tilt,
                tilt_out_of_range: self.oor,
                commanded_w: &self.cmd,
                readback_w: &self.rb,
                last_applied_w: &self.last,
                overrun: self.overrun,
            })
        }
    }

    #[test]
    fn quiet_stage_passes_commands_through() {
        let mut il = Interlocks::new(&cfg());
        let v = T::ok().eval(&mut il, 0.0);
        assert_eq!(v.power_w, vec![1.0; 3]);
        assert!(!v.safe && !v.overridden && v.changes.is_empty());
    }

    #[test]
    fn over_temperature_goes_safe_at_once_and_latches() {
        let mut il = Interlocks::new(&cfg());
        let mut t = T::ok();
        t.temps[1] = Some(36.0);
        let v = t.eval(&mut il, 1.0);
        assert!(v.safe);
        assert_eq!(v.power_w, vec![0.0; 3]);
        assert!(
            matches!(&v.changes[0], AlarmChange::Raised(a) if a.id == "leg_over_temperature:B")
        );
        // Cleared but latched until acknowledged.
        let v = T::ok().eval(&mut il, 2.0);
        assert_eq!(
            v.changes,
            vec![AlarmChange::Cleared("leg_over_temperature:B".into())]
        );
        assert_eq!(il.alarms().len(), 1);
        assert!(!il.alarms()[0].active);
        assert_eq!(
            il.acknowledge(Some("leg_over_temperature:B"), "op")
                .unwrap(),
            vec!["leg_over_temperature:B".to_string()]
        );
        assert!(il.alarms().is_empty());
        assert!(il.acknowledge(Some("nope"), "op").is_err());
    }

    #[test]
    fn stale_sensor_holds_after_n_ticks() {
        let c = cfg();
        let n = c.interlocks.sensor_stale.after_ticks;
        let mut il = Interlocks::new(&c);
        let mut t = T::ok();
        t.temps[0] = None;
        t.cmd = vec![1.5; 3];
        t.last = vec![0.7; 3];
        for k in 1..n {
            let v = t.eval(&mut il, k as f64);
            assert_eq!(v.power_w, vec![1.5; 3], "tick {k}: not yet");
        }
        let v = t.eval(&mut il, n as f64);
        assert_eq!(v.power_w, vec![0.7; 3], "held at the last applied values");
        assert!(!v.safe);
    }

    #[test]
    fn open_heater_is_detected_from_readback() {
        let c = cfg();
        let mut il = Interlocks::new(&c);
        let mut t = T::ok();
        t.rb[2] = Some(0.0);
        let mut raised = false;
        for k in 0..c.interlocks.heater_open_circuit.after_ticks {
            raised |=
                t.eval(&mut il, k as f64).changes.iter().any(
                    |ch| matches!(ch, AlarmChange::Raised(a) if a.id == "heater_open_circuit:C"),
                );
        }
        assert!(raised);
    }

    #[test]
    fn limit_action_clamps_the_offending_leg_only() {
        let mut c = cfg();
        c.interlocks.leg_over_temperature.action = InterlockAction::Limit;
        let mut il = Interlocks::new(&c);
        let mut t = T::ok();
        t.temps[0] = Some(40.0);
        let v = t.eval(&mut il, 0.0);
        assert_eq!(v.power_w, vec![0.0, 1.0, 1.0]);
        assert!(!v.safe);
    }

    #[test]
    fn disagreement_out_of_range_and_overrun() {
        let mut il = Interlocks::new(&cfg());
        let mut t = T::ok();
        t.temps[2] = Some(30.0);
        t.oor = true;
        t.tilt = None;
        t.overrun = true;
        let mut ids = Vec::new();
        for k in 0..20 {
            for ch in t.eval(&mut il, k as f64).changes {
                if let AlarmChange::Raised(a) = ch {
                    ids.push(a.id);
                }
            }
        }
        for want in [
            "thermometer_disagreement:C",
            "tilt_out_of_range",
            "loop_overrun",
        ] {
            assert!(ids.iter().any(|i| i == want), "{want} not in {ids:?}");
        }
        assert!(
            !ids.iter().any(|i| i == "sensor_stale:tilt"),
            "out of range is not also stale"
        );
    }

    #[test]
    fn outputs_never_leave_zero_to_max() {
        let mut il = Interlocks::new(&cfg());
        let mut t = T::ok();
        t.cmd = vec![f64::NAN, 5.0, -1.0];
        let v = t.eval(&mut il, 0.0);
        assert_eq!(v.power_w, vec![0.0, 2.0, 0.0]);
    }
}
