#!/usr/bin/env bash
# The full check of the demo CNN against a naive NumPy loop: the `cnn` section of benches/graph.sh.
exec "$(dirname "$0")/graph.sh" cnn
