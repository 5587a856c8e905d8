#[test]
#[ignore]
fn scratch() {
    use posconform::case::Output;
    use posconform::math::Dtype;
    use posconform::reference::{expected, variant_outputs};
    use posconform::tensor::Tensor;
    let case = posconform::suite::suite("core").unwrap().into_iter().find(|c| c.id == "xl_relative.scores.short_memory").unwrap();
    let inputs = case.inputs().unwrap();
    let mut zeroed = inputs.clone();
    let u = zeroed.remove("content_bias").unwrap();
    zeroed.insert("content_bias".into(), Tensor::from_f64(u.dtype(), u.into_values() * 0.0));
    let kernel = expected(&case, &zeroed).unwrap();
    for id in ["xl-content-bias-missing", "xl-biases-missing", "xl-position-bias-missing"] {
        let fault = posconform::diagnose::fault(id).unwrap();
        let v = variant_outputs(&case, &inputs, Dtype::F64, fault.variant).unwrap();
        let a = &v[&Output::Scores]; let k = &kernel[&Output::Scores];
        let d = a.iter().zip(k.iter()).filter(|(a, b)| a.is_finite()).map(|(a, b)| (a - b).abs()).fold(0.0, f64::max);
        println!("{id} max diff {d:e} first {} {}", a[[0,0,0]], k[[0,0,0]]);
    }
}
