use super::*;

fn summary(xs: &[f64], keep: bool) -> LossSummary {
    let mut s = if keep { LossSummary::keeping_losses(1.0) } else { LossSummary::new(1.0) };
    for &x in xs {
        s.push(x);
    }
    s
}

#[test]
fn confidence_must_be_inside_the_open_unit_interval() {
    for c in [0.0, 1.0, -0.5, 1.5, f64::NAN] {
        assert!(Confidence::new(c).is_err(), "{c}");
    }
    assert_eq!(Confidence::new(0.9).unwrap().level(), 0.9);
}

#[test]
fn empty_summaries_have_no_bounds() {
    for m in Method::ALL {
        assert_eq!(bounds(m, &summary(&[], true), Confidence::new(0.95).unwrap()), Err(EstimateError::Empty));
    }
}

#[test]
fn betting_needs_the_losses_kept() {
    let s = summary(&[0.2, 0.4], false);
    assert_eq!(bounds(Method::Betting, &s, Confidence::new(0.95).unwrap()), Err(EstimateError::LossesNotKept));
    assert!(s.losses().is_none());
}

#[test]
fn empirical_bernstein_is_trivial_for_one_sample() {
    let s = summary(&[0.3], false);
    assert_eq!(bounds(Method::EmpiricalBernstein, &s, Confidence::new(0.95).unwrap()).unwrap(), Bounds::TRIVIAL);
}

#[test]
fn clopper_pearson_applies_only_to_binary_losses() {
    let s = summary(&[0.0, 1.0, 0.5], false);
    assert!(!Method::ClopperPearson.applies(&s));
    assert_eq!(bounds(Method::ClopperPearson, &s, Confidence::new(0.95).unwrap()), Err(EstimateError::NotBinary(1)));
    assert!(Method::ClopperPearson.applies(&summary(&[0.0, 1.0], false)));
}

#[test]
fn bounds_scale_with_the_loss_maximum() {
    // The same losses on [0, 1] and on [0, 4] give bounds that differ by the factor 4.
    let mut a = LossSummary::keeping_losses(1.0);
    let mut b = LossSummary::keeping_losses(4.0);
    for x in [0.1, 0.5, 0.25, 0.0, 1.0] {
        a.push(x);
        b.push(4.0 * x);
    }
    let c = Confidence::new(0.9).unwrap();
    for m in Method::ALL.into_iter().filter(|m| m.applies(&a)) {
        let (x, y) = (bounds(m, &a, c).unwrap(), bounds(m, &b, c).unwrap());
        assert!((4.0 * x.lower - y.lower).abs() < 1e-12 && (4.0 * x.upper - y.upper).abs() < 1e-12, "{m}");
    }
}

#[test]
fn method_names_round_trip() {
    for m in Method::ALL {
        assert_eq!(Method::parse(m.name()), Some(m));
    }
    assert_eq!(Method::parse("wilson"), None);
}
