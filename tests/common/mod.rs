//! Shared set-up of the integration tests: the demo scenario without signals, the default pipeline.

use axsift::calib::CampaignSpec;
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

/// A campaign just large enough for an eta: one null and three injection realisations at
/// SNR 20, no efficiency curve.
#[allow(dead_code)] // not every test file makes a calibration
pub fn eta_campaign(seed: u64) -> CampaignSpec {
    CampaignSpec {
        seed,
        null_realisations: 1,
        eta_realisations: 3,
        eta_snr: 20.0,
        snr_grid: vec![],
        realisations_per_snr: 0,
        max_injections_per_realisation: 40,
    }
}
