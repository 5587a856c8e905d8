//! The self-test: every catalogued fault planted in an otherwise correct kernel.

use posconform::run::check::CheckOptions;
use posconform::run::plant::plant_all;
use posconform::suite::suite;

/// Prints the table for every fault (the suite only, no fuzzing).
#[test]
#[ignore]
fn print_the_core_table() {
    let cases = suite("core").unwrap();
    let options = CheckOptions {
        fuzz_cases: 0,
        ..CheckOptions::default()
    };
    let only: Vec<String> = std::env::var("PLANT")
        .map(|s| s.split(',').map(String::from).collect())
        .unwrap_or_default();
    let results = plant_all(&cases, &options, &only, &mut |_, _, _| {}).unwrap();
    for r in &results {
        println!(
            "{:40} {:45} suite {:2} named {:40} top1 {} conclusive {} {:.2}s",
            r.fault,
            r.detected_by.clone().unwrap_or_else(|| "-".into()),
            r.failing_suite_cases,
            r.named.unwrap_or("-"),
            r.top1,
            r.conclusive,
            r.seconds
        );
    }
    let detected = results.iter().filter(|r| r.detected_by.is_some()).count();
    let top1 = results.iter().filter(|r| r.top1).count();
    println!(
        "{} faults, {detected} detected, {top1} top-1",
        results.len()
    );
}

/// Prints, per core case, the catalogued faults whose planted kernel fails it (JSON).
#[test]
#[ignore]
fn print_what_each_core_case_catches() {
    use posconform::compare::{CompareOptions, Verdict};
    use posconform::kernel::Kernel;
    use posconform::run::check::run_case;
    use posconform::run::plant::PlantedKernel;
    let cases = suite("core").unwrap();
    let mut map = serde_json::Map::new();
    for case in &cases {
        let mut caught = Vec::new();
        for fault in posconform::diagnose::catalogue() {
            let mut kernel = PlantedKernel::new(fault);
            let info = kernel.describe().unwrap();
            let options = CompareOptions {
                diagnose: false,
                ..CompareOptions::default()
            };
            let (report, _) = run_case(&mut kernel, &info, case, &options);
            if report.verdict == Verdict::Fail {
                caught.push(serde_json::Value::from(fault.id));
            }
        }
        map.insert(case.id.clone(), caught.into());
    }
    println!("{}", serde_json::Value::Object(map));
}

/// Prints the run diagnosis of the faults named in PLANT (debugging aid).
#[test]
#[ignore]
fn print_run_diagnosis() {
    use posconform::run::check::check;
    use posconform::run::plant::PlantedKernel;
    let cases = suite("core").unwrap();
    let options = CheckOptions {
        fuzz_cases: std::env::var("PLANT_FUZZ")
            .ok()
            .and_then(|f| f.parse().ok())
            .unwrap_or(0),
        ..posconform::run::plant::options(0, 0x5eed)
    };
    for id in std::env::var("PLANT").unwrap_or_default().split(',') {
        let Some(fault) = posconform::diagnose::fault(id) else {
            continue;
        };
        let mut kernel = PlantedKernel::new(fault);
        let outcome = check(&mut kernel, &cases, &options, &mut |_, _, _| {}).unwrap();
        println!("{id}: {:#?}", outcome.report.diagnosis);
        if let Ok(case) = std::env::var("PLANT_CASE") {
            for m in outcome.minimal.iter().filter(|m| m.case.id == case) {
                println!("{}", serde_json::to_string(&m.case).unwrap());
                let inputs = m.case.inputs().unwrap();
                let dtype = m.case.dtype;
                let v =
                    posconform::reference::variant_outputs(&m.case, &inputs, dtype, fault.variant)
                        .unwrap();
                let e = posconform::reference::expected(&m.case, &inputs).unwrap();
                let mut k = PlantedKernel::new(fault);
                use posconform::kernel::Kernel;
                if let posconform::kernel::Answer::Outputs { outputs, .. } =
                    k.run(&m.case, dtype, &inputs).unwrap()
                {
                    for (o, want) in &e {
                        let got = outputs[o.name()].view().to_owned();
                        for ((idx, w), (g, vv)) in
                            want.indexed_iter().zip(got.iter().zip(v[o].iter()))
                        {
                            if (g - w).abs() > 1e-6 || (g - vv).abs() > 1e-6 {
                                println!("{o} {idx:?} want {w} got {g} variant {vv}");
                            }
                        }
                    }
                }
            }
            for c in outcome.report.cases.iter().filter(|c| c.case == case) {
                println!("{:#?}", c.diagnosis);
                for o in &c.outputs {
                    println!(
                        "{} over {} worst {:?} got {} want {} tol {}",
                        o.name,
                        o.over_budget,
                        o.worst,
                        o.worst_got,
                        o.worst_expected,
                        o.worst_tolerance
                    );
                }
            }
        }
    }
}
