//! Rule parsing and evaluation on hand-made report figures.

use super::rules::RegressionRule;
use super::*;

#[test]
fn flags_parse_with_estimator_names_that_contain_colons() {
    let r = Rule::parse_flag("gae:0.95:snr>=2@interval").unwrap();
    assert_eq!(r.estimator, "gae:0.95");
    assert_eq!(r.stat, Stat::Snr);
    assert_eq!(r.bound, Bound::Min(2.0));
    assert_eq!(r.at, At::Interval);
    assert!(!r.allow_undefined);
    let r = Rule::parse_flag("*:relative_bias<=0.25?").unwrap();
    assert_eq!(
        (r.estimator.as_str(), r.bound, r.allow_undefined),
        ("*", Bound::Max(0.25), true)
    );
    assert!(
        Rule::parse_flag("rtg:snr>2")
            .unwrap_err()
            .contains("ESTIMATOR:STAT>=VALUE")
    );
    assert!(
        Rule::parse_flag("rtg:speed>=2")
            .unwrap_err()
            .contains("unknown statistic")
    );
    assert!(
        Rule::parse_flag("gae:3:snr>=2")
            .unwrap_err()
            .contains("[0, 1]")
    );
    assert!(Rule::parse_flag("rtg:snr>=nan").is_err());
    let g = RegressionRule::parse_flag("nstep:5:mse:10%").unwrap();
    assert_eq!(
        (g.estimator.as_str(), g.stat, g.tolerance_pct),
        ("nstep:5", Stat::Mse, 10.0)
    );
    assert_eq!(
        RegressionRule::parse_flag("variance:25").unwrap().estimator,
        "*"
    );
}

#[test]
fn rules_file_errors_name_the_place() {
    let ok = r#"{"schema": "gradaudit.rules/1",
                 "rules": [{"estimator": "rtg", "stat": "snr", "min": 1, "at": "interval"}],
                 "regressions": [{"stat": "variance", "tolerance_pct": 25}]}"#;
    let set = RuleSet::from_json(ok, "r.json").unwrap();
    assert_eq!(set.rules[0].at, At::Interval);
    assert_eq!(set.regressions[0].estimator, "*");
    let syntax = RuleSet::from_json(
        "{\n  \"schema\": \"gradaudit.rules/1\",\n  \"rules\": [,]\n}",
        "r.json",
    )
    .unwrap_err()
    .to_string();
    assert!(syntax.contains("r.json, line 3"), "{syntax}");
    let both = r#"{"schema": "gradaudit.rules/1", "rules": [{"stat": "snr", "min": 1, "max": 2}]}"#;
    assert!(
        RuleSet::from_json(both, "r.json")
            .unwrap_err()
            .to_string()
            .contains("exactly one")
    );
    let unknown = r#"{"schema": "gradaudit.rules/1", "rules": [{"stat": "snr", "mni": 1}]}"#;
    assert!(
        RuleSet::from_json(unknown, "r.json")
            .unwrap_err()
            .to_string()
            .contains("mni")
    );
    let schema = r#"{"schema": "other/2"}"#;
    assert!(
        RuleSet::from_json(schema, "r.json")
            .unwrap_err()
            .to_string()
            .contains("other/2")
    );
}

#[test]
fn margins_are_positive_when_the_bound_holds() {
    assert_eq!(Bound::Min(2.0).margin(3.5), 1.5);
    assert_eq!(Bound::Max(2.0).margin(3.5), -1.5);
}

#[test]
fn worse_means_lower_for_snr_and_higher_for_variance() {
    assert!(Stat::Snr.higher_is_better() && Stat::CosineHalf.higher_is_better());
    assert!(!Stat::Variance.higher_is_better() && !Stat::EpisodesForSnr.higher_is_better());
}

#[test]
fn figures_that_are_not_finite_satisfy_no_rule() {
    // A baseline written elsewhere may hold anything; an overflowed figure is undefined.
    let f = Figures {
        variance: Some(f64::INFINITY),
        bias_sq: Some(f64::NAN),
        mse: None,
        snr: Some(f64::NAN),
        ess: Some(f64::INFINITY),
        cosine_half: None,
        episodes_for_snr: None,
        signal: None,
    };
    for stat in Stat::ALL {
        assert_eq!(f.stat(stat), None, "{}", stat.key());
    }
    // An undefined signal leaves the relative figures undefined, whatever the bias.
    let g = Figures {
        variance: Some(1.0),
        bias_sq: Some(0.0),
        ..f
    };
    assert_eq!(g.stat(Stat::RelativeBias), None);
    assert_eq!(g.stat(Stat::RelativeVariance), None);
    assert_eq!(g.stat(Stat::Variance), Some(1.0));
}
