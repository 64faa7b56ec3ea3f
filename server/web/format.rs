//! Number formatting for templates (askama passes arguments by reference).

/// Formatting helpers available in every template as `f`.
#[derive(Debug, Clone, Copy, Default)]
pub struct Fmt;

fn fixed(x: f64, decimals: usize) -> String {
    if !x.is_finite() {
        return "–".to_string();
    }
    // Negative zero reads as a difference that is not there: the tick labels drop it too.
    crate::charts::tick(x, decimals).replace('-', "−")
}

impl Fmt {
    /// A participation model's name as every page writes it (`logit` -> "Logit").
    pub fn model<'a>(&self, name: &'a str) -> &'a str {
        crate::analysis::settings::model_label_of(name)
    }
    pub fn n1(&self, x: &f64) -> String {
        fixed(*x, 1)
    }
    pub fn n2(&self, x: &f64) -> String {
        fixed(*x, 2)
    }
    pub fn n3(&self, x: &f64) -> String {
        fixed(*x, 3)
    }
    pub fn n4(&self, x: &f64) -> String {
        fixed(*x, 4)
    }
    pub fn o1(&self, x: &Option<f64>) -> String {
        x.map_or_else(|| "–".to_string(), |v| fixed(v, 1))
    }
    pub fn o2(&self, x: &Option<f64>) -> String {
        x.map_or_else(|| "–".to_string(), |v| fixed(v, 2))
    }
    pub fn o3(&self, x: &Option<f64>) -> String {
        x.map_or_else(|| "–".to_string(), |v| fixed(v, 3))
    }
    pub fn pct(&self, x: &f64) -> String {
        format!("{}%", fixed(100.0 * x, 0))
    }
    pub fn opct(&self, x: &Option<f64>) -> String {
        x.map_or_else(|| "–".to_string(), |v| format!("{}%", fixed(100.0 * v, 0)))
    }
    /// A quantile as an ordinal percentile: 0.95 -> "95th".
    pub fn ordinal(&self, q: &f64) -> String {
        let p = (100.0 * q).round() as i64;
        let suffix = match (p % 10, p % 100) {
            (1, 11) | (2, 12) | (3, 13) => "th",
            (1, _) => "st",
            (2, _) => "nd",
            (3, _) => "rd",
            _ => "th",
        };
        format!("{p}{suffix}")
    }

    /// CSS class of an SMD: within 0.1, within 0.25, beyond.
    pub fn smd_class(&self, x: &Option<f64>) -> &'static str {
        match x.map(f64::abs) {
            None => "smd-none",
            Some(v) if v < 0.1 => "smd-good",
            Some(v) if v < 0.25 => "smd-watch",
            Some(_) => "smd-poor",
        }
    }
    /// CSS class of a known SMD.
    pub fn smd_class_of(&self, x: &f64) -> &'static str {
        self.smd_class(&Some(*x))
    }

    /// CSS shade class of a rate, in steps of 20 points.
    pub fn shade(&self, x: &Option<f64>) -> String {
        x.map_or_else(
            || "shade-none".to_string(),
            |x| format!("shade-{}", ((x * 5.0).floor() as i64).clamp(0, 4)),
        )
    }
}
