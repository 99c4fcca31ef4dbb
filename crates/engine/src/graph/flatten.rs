//! `flatten`: any shape to [features], keeping C order (for an image: channels, then rows, then
//! columns). The values do not move; only the shape the next layer sees changes.

use ndarray::{ArrayD, ArrayView2};

use super::{Back, Kind, Layer, LayerScalar, Shape, ShapeError, Step};

/// A flatten bound to its input shape.
#[derive(Clone, Debug)]
pub struct Flatten {
    input: Shape,
}

impl Flatten {
    pub fn new(input: &Shape) -> Result<Flatten, ShapeError> {
        Ok(Flatten { input: *input })
    }
}

impl Kind for Flatten {
    fn kind(&self) -> &'static str {
        "flatten"
    }

    fn input(&self) -> Shape {
        self.input
    }

    fn output(&self) -> Shape {
        Shape::Flat(self.input.size())
    }
}

impl<S: LayerScalar> Layer<S> for Flatten {
    fn forward(&self, _: &[ArrayD<S>], x: ArrayView2<S>, _: Option<ArrayView2<S>>) -> Step<S> {
        Step::plain(x.to_owned())
    }

    fn backward(
        &self,
        _: &[ArrayD<S>],
        _: ArrayView2<S>,
        _: &Step<S>,
        dout: ArrayView2<S>,
        _: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        Back {
            params: Vec::new(),
            dx: need_input.then(|| dout.to_owned()),
            dskip: None,
        }
    }
}
