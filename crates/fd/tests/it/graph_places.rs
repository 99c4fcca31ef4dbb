//! Where a parameter is located (`plumb_fd::report::Places`): the weight file's own tensor and
//! its flat index there, DESIGN §5/§6. The expected indices are worked out by hand from the
//! storage rules of docs/description.md (an augmented matrix's bias in column 0, a
//! split-transposed weight in × out, a conv weight stored `kio`), not from plumb's conversions;
//! the values at those indices are checked against the file plumb writes (`to_file`).

use std::path::Path;

use ndarray::ArrayD;
use plumb_engine::{Init, Rng};
use plumb_fd::report::Places;
use plumb_formats::GraphDescription;

fn desc(text: &str) -> GraphDescription {
    GraphDescription::parse(Path::new("places.toml"), text).unwrap()
}

const DENSE: &str = "inputs = 4\nloss = \"cross-entropy\"\n\n[[layer]]\nunits = 5\nactivation = \"tanh\"\n\n[[layer]]\nunits = 3\nactivation = \"softmax\"\n";

/// Every graph parameter's place holds its value in the file, and going back gives it again.
fn round_trip(d: &GraphDescription) {
    let params: Vec<ArrayD<f64>> = Init::GlorotUniform.graph_params(&d.graph, &mut Rng::new(5));
    let file = d.to_file(&params).unwrap();
    let places = Places::new(d);
    for (t, p) in params.iter().enumerate() {
        for (k, v) in p.iter().enumerate() {
            let at = places.place(t, k);
            let f = places.file_named(&at.tensor).unwrap();
            assert_eq!(file[f].data[at.index], *v, "{t}:{k} → {}", at.label());
            assert_eq!(places.entry(f, at.index), Some((t, k)));
        }
    }
}

#[test]
fn an_augmented_matrix_numbers_its_entries_with_the_bias_in_column_zero() {
    let d = desc(DENSE);
    let places = Places::new(&d);
    // Layer 1: weight 5 × 4 (graph tensor 0), bias (graph tensor 1), file `layer1` 5 × 5.
    let w = places.place(0, 2 * 4 + 3); // unit 2, input 3 (from 0)
    assert_eq!(
        (w.tensor.as_str(), w.index, w.layer),
        ("layer1", 2 * 5 + 4, 1)
    );
    assert_eq!(w.location, "unit 2, input 3");
    let b = places.place(1, 2);
    assert_eq!((b.tensor.as_str(), b.index), ("layer1", 2 * 5));
    assert_eq!(b.location, "unit 2, bias");
    assert_eq!(places.span(0), "layer1 (weights)");
    assert_eq!(places.span(1), "layer1 (bias column)");
    assert_eq!(places.span_bias(1), Some(true));
    assert_eq!(places.entry(0, 25), None);
    round_trip(&d);
}

#[test]
fn a_split_transposed_weight_is_indexed_in_its_in_by_out_order() {
    let d = desc(&DENSE.replace(
        "inputs = 4\n",
        "inputs = 4\nlayout = \"split-transposed\"\n",
    ));
    let places = Places::new(&d);
    // Layer 2: weight 3 × 5 canonical, stored 5 × 3; unit 1, input 3 (from 0).
    let w = places.place(2, 5 + 3);
    assert_eq!((w.tensor.as_str(), w.index), ("layer2.weight", 3 * 3 + 1));
    assert_eq!(w.location, "unit 1, input 3");
    let b = places.place(3, 1);
    assert_eq!((b.tensor.as_str(), b.index), ("layer2.bias", 1));
    assert_eq!(places.span(2), "layer2.weight");
    assert_eq!(places.span_bias(2), None);
    round_trip(&d);
}

#[test]
fn a_conv_weight_stored_kio_is_indexed_in_kio_order() {
    let d = desc(
        "input = [2, 8]\nloss = \"cross-entropy\"\n\n[[layer]]\nkind = \"conv1d\"\nname = \"c\"\nchannels = 3\nkernel = 4\nstorage = \"kio\"\n\n[[layer]]\nkind = \"flatten\"\n\n[[layer]]\nunits = 2\nactivation = \"softmax\"\n",
    );
    let places = Places::new(&d);
    // Canonical o × i × k = 3 × 2 × 4; entry (o 2, i 1, k 3) is 2·8 + 1·4 + 3 = 23. In the file
    // k × i × o = 4 × 2 × 3 it is 3·6 + 1·3 + 2 = 23 too by chance; take (o 1, i 0, k 2):
    // canonical 1·8 + 0 + 2 = 10, file 2·6 + 0·3 + 1 = 13.
    let w = places.place(0, 10);
    assert_eq!((w.tensor.as_str(), w.index), ("c.weight", 13));
    assert_eq!(w.location, "out-channel 1, in-channel 0, kernel 2");
    round_trip(&d);
}
