// Package pycapture carries python/heed_capture.py, the one-file Python
// module that records a live PyTorch model into heed-export/1, so that the
// heed binary can write it out (heed capture-py). Only cmd imports it.
package pycapture

import _ "embed"

// Source is the text of heed_capture.py.
//
//go:embed heed_capture.py
var Source []byte

// FileName is the name the module is written under.
const FileName = "heed_capture.py"
