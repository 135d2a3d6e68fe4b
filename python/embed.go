// Package pycapture carries python/heed_capture.py, the module that records a
// live PyTorch model's attention into a heed export, so that the heed binary
// can write it out (heed capture-py). Only cmd imports it.
package pycapture

import _ "embed"

// Source is the text of heed_capture.py.
//
//go:embed heed_capture.py
var Source []byte

// FileName is the module's file name.
const FileName = "heed_capture.py"
