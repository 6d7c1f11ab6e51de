//! Shared set-up of the integration tests: the demo scenario without signals, the default pipeline.

use axsift::sim::Scenario;

/// The default pipeline file.
pub const PIPELINE: &str = include_str!("../../pipeline.toml");
/// The demo scenario.
pub const DEMO_SCENARIO: &str = include_str!("../../fixtures/demo_night.toml");

/// The demo facility and scan with no axion and no interference.
pub fn null_scenario(seed: u64) -> Scenario {
    let mut sc = Scenario::from_toml(DEMO_SCENARIO).expect("demo scenario parses");
    sc.seed = seed;
    sc.axion.clear();
    sc.interference.clear();
    sc
}
