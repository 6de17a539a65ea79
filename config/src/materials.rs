//! Leg materials and their linear thermal expansion coefficients.
//!
//! Values are the room-temperature (20–25 °C) coefficients of linear expansion as
//! tabulated in the CRC Handbook of Chemistry and Physics ("Thermal Expansion of
//! Metals and Alloys" / element property tables); the alloy values are typical
//! handbook figures for annealed material. A stage built from something else names
//! its coefficient directly with `cte_per_k`.

/// A named material with its linear thermal expansion coefficient.
#[derive(Debug, Clone, PartialEq)]
pub struct Material {
    /// The key used in configuration files (`material = "aluminium"`), or `custom`.
    pub name: String,
    /// Linear expansion coefficient, 1/K.
    pub cte_per_k: f64,
}

/// The built-in table: (name, coefficient of linear expansion in 1/K at about 25 °C).
pub const MATERIALS: &[(&str, f64)] = &[
    ("aluminium", 23.1e-6),
    ("copper", 16.5e-6),
    ("iron", 11.8e-6),
    ("titanium", 8.6e-6),
    ("stainless_304", 17.3e-6),
    ("invar_36", 1.2e-6),
    ("fused_silica", 0.55e-6),
];

/// Looks a material up by its configuration key.
pub fn lookup(name: &str) -> Option<Material> {
    MATERIALS
        .iter()
        .find(|(n, _)| *n == name)
        .map(|&(n, c)| Material {
            name: n.to_string(),
            cte_per_k: c,
        })
}

/// The accepted names, for error messages.
pub fn names() -> String {
    MATERIALS
        .iter()
        .map(|(n, _)| *n)
        .collect::<Vec<_>>()
        .join(", ")
}
