package loader

import (
	"fmt"
	"sync"
)

// Export is one opened export in the heed-export/1 convention: one file, a
// directory of per-layer files, or several files whose array names do not
// collide. Close releases its files.
type Export struct {
	// Paths are the files the export was assembled from.
	Paths []string
	// Format is the metadata's "format" ("heed-export/1"), or "" without metadata.
	Format string
	// Blocks in name order.
	Blocks []*Block
	// Sides by name ("target", "source", ...): tokens, padding and segments.
	Sides map[string]*Side
	// Logits is the optional `logits` array [batch, position, vocab].
	Logits Array
	// Vocab is the optional `vocab` array [vocab] of strings: the text of
	// each vocabulary index of Logits, read only when asked (VocabText).
	Vocab Array
	// Warnings are things a user should know that are not errors (e.g. head
	// axis of length 1: heads were averaged at export).
	Warnings []string

	containers []Container
}

// Close closes every file of the export.
func (e *Export) Close() error {
	var first error
	for _, c := range e.containers {
		if err := c.Close(); err != nil && first == nil {
			first = err
		}
	}
	e.containers = nil
	return first
}

// Block returns the block with the given name, or nil.
func (e *Export) Block(name string) *Block {
	for _, b := range e.Blocks {
		if b.Name == name {
			return b
		}
	}
	return nil
}

// Side returns the named side, or nil.
func (e *Export) Side(name string) *Side {
	if e.Sides == nil {
		return nil
	}
	return e.Sides[name]
}

// Side is one token sequence of the export (e.g. "target" or "source").
type Side struct {
	Name string
	// Len is the sequence length.
	Len int
	// Tokens per batch item ([batch][Len]); a [seq] array is shared by every
	// batch item (len(Tokens) == 1). nil when the export has no tokens.
	Tokens [][]string
	// Valid per batch item: true = real token, false = padding. nil = all valid.
	Valid [][]bool
	// Segments per batch item: document id per position. nil = one document.
	Segments [][]int64
}

// Token returns the token at (batch, pos), or "" when unknown.
func (s *Side) Token(batch, pos int) string {
	if s == nil || len(s.Tokens) == 0 {
		return ""
	}
	row := s.Tokens[0]
	if batch < len(s.Tokens) {
		row = s.Tokens[batch]
	}
	if pos < 0 || pos >= len(row) {
		return ""
	}
	return row[pos]
}

// IsValid reports whether (batch, pos) is a real token (true when the export has no valid array).
func (s *Side) IsValid(batch, pos int) bool {
	if s == nil || len(s.Valid) == 0 {
		return true
	}
	row := s.Valid[0]
	if batch < len(s.Valid) {
		row = s.Valid[batch]
	}
	if pos < 0 || pos >= len(row) {
		return true
	}
	return row[pos]
}

// Segment returns the document id at (batch, pos), 0 when the export has none.
func (s *Side) Segment(batch, pos int) int64 {
	if s == nil || len(s.Segments) == 0 {
		return 0
	}
	row := s.Segments[0]
	if batch < len(s.Segments) {
		row = s.Segments[batch]
	}
	if pos < 0 || pos >= len(row) {
		return 0
	}
	return row[pos]
}

// Block is one attention block (e.g. "decoder", "encoder", "cross") with its
// rules and lazy access to every (layer, batch, head) matrix.
type Block struct {
	Name      string
	Kind      Kind
	QuerySide string // side name of the queries, "" when unknown
	KeySide   string // side name of the keys
	DType     DType
	Layers    int
	Batch     int // 1 when the export has no batch axis
	Heads     int
	Queries   int
	Keys      int
	// Window W > 0: a query at absolute position p may see keys p-W < k <= p.
	Window int
	// Prefix P > 0: the first P positions see each other both ways.
	Prefix int
	// KVHeads is the number of key/value heads (grouped-query attention); 0 = Heads.
	KVHeads int
	// QueryOffset is the absolute position of query row 0 (Keys-Queries for a
	// causal block whose queries are the last Q of K positions, else 0; with
	// QPos, the position of row 0 of batch item 0, for labels).
	QueryOffset int
	// QPos, when not nil, holds the key position of every query row per
	// batch item ([batch][Queries], or one row shared by every item): from
	// BLOCK/qpos, or from query_start. Use QueryPos.
	QPos [][]int
	// PosFrom says how query rows were placed among the keys: "qpos"
	// (BLOCK/qpos), "metadata" (query_start), "option" (Options.QueryStart), "offset"
	// (a causal block with fewer queries than keys: the last Q of K
	// positions, assumed) or "" (row q is position q).
	PosFrom string
	// PosEvidence says why the query positions are unknown (PosFrom
	// "unknown", set by analysis when the data contradicts "offset").
	PosEvidence string
	// KindFrom says who gave Kind: "option" (Options.Kind), "metadata", "attribute", or ""
	// when nobody did (analysis may then infer it and write "inferred").
	KindFrom string
	// KindEvidence is, for a kind analysis inferred, what the data showed.
	KindEvidence string
	// AxesFrom says who gave Axes: "option" (Options.Axes), "metadata", "attribute", or
	// "rank" when heed read them by the array's rank (a guess).
	AxesFrom string
	// AxesOther is, when the axes were guessed and the array could also be
	// read another way, the axes of that other reading (an Options.Axes value).
	AxesOther string
	// ComputeDType is the dtype the model computed attention in (metadata
	// compute_dtype, Options.ComputeDType); Invalid when nobody said.
	ComputeDType DType
	// Axes names the stored axes of the attention arrays, e.g.
	// "layer batch head query key" (per-layer arrays: without "layer").
	Axes string
	// Source names the array(s) the attention comes from, e.g. "decoder/attn"
	// or "decoder/attn/{0..11}", for messages.
	Source string

	HasGrad  bool
	HasAllow bool
	// OutLayers, Positions, Features describe the optional activations
	// `BLOCK/out` [layer, batch, position, feature]; OutLayers is 0 without them.
	OutLayers int
	Positions int
	Features  int
	// OutDType is the element type of the activations (Invalid without them).
	OutDType DType

	attn  []slab // per layer
	grad  []slab // per layer, nil without gradients
	out   []slab // per layer, nil without activations
	allow *allowSource
}

// QueryPos returns the key position of query row q of batch item b: where
// the query sits in the key sequence, which the positional rules (causal,
// window, prefix) compare keys with.
func (b *Block) QueryPos(batch, q int) int {
	if b.QPos == nil {
		return q + b.QueryOffset
	}
	row := b.QPos[0]
	if batch < len(b.QPos) {
		row = b.QPos[batch]
	}
	return row[q]
}

// slab locates one layer's [batch, head, query, key] data inside an array.
type slab struct {
	arr Array
	// prefix is the index template passed to ReadFloat32; batchAt and headAt are
	// the positions in prefix to fill in, -1 when the axis is absent.
	prefix  []int
	batchAt int
	headAt  int
	// transposed is true when the stored order of the last two axes is key, query.
	transposed bool
	// flat is set when arr is stored in C order: a (batch, head) matrix is
	// then the contiguous run of elements starting at
	// base + batch*batchStride + head*headStride, read without building an index.
	flat                          flatReader
	base, batchStride, headStride int
}

// matPool recycles the scratch matrices of transposed reads and masks.
var matPool sync.Pool

func getScratch(n int) *[]float32 {
	if p, ok := matPool.Get().(*[]float32); ok && cap(*p) >= n {
		*p = (*p)[:n]
		return p
	}
	s := make([]float32, n)
	return &s
}

// allowSource is an explicit mask array broadcastable to [batch, head, query, key].
type allowSource struct {
	arr Array
	// shape4 is the array's shape left-padded with 1s to rank 4.
	shape4 [4]int
	// additive is true for a float bias array (0 = allowed, <= -1e4 or -inf = blocked).
	additive bool
}

func (b *Block) check(layer, batch, head int, n int) error {
	if layer < 0 || layer >= b.Layers || batch < 0 || batch >= b.Batch || head < 0 || head >= b.Heads {
		return fmt.Errorf("loader: %s: layer %d batch %d head %d out of range [%d, %d, %d]", b.Name, layer, batch, head, b.Layers, b.Batch, b.Heads)
	}
	if n != b.Queries*b.Keys {
		return fmt.Errorf("loader: %s: buffer of %d values, need %d x %d", b.Name, n, b.Queries, b.Keys)
	}
	return nil
}

func (s *slab) read(batch, head int, dst []float32, q, k int) error {
	if s.batchAt < 0 {
		batch = 0
	}
	if s.headAt < 0 {
		head = 0
	}
	if !s.transposed {
		if s.flat != nil {
			return s.flat.readFlat(s.base+batch*s.batchStride+head*s.headStride, len(dst), dst)
		}
		return s.arr.ReadFloat32(s.index(batch, head), dst)
	}
	tp := getScratch(len(dst))
	defer matPool.Put(tp)
	tmp := *tp
	var err error
	if s.flat != nil {
		err = s.flat.readFlat(s.base+batch*s.batchStride+head*s.headStride, len(tmp), tmp)
	} else {
		err = s.arr.ReadFloat32(s.index(batch, head), tmp)
	}
	if err != nil {
		return err
	}
	for kk := 0; kk < k; kk++ {
		row := tmp[kk*q : kk*q+q]
		for qq, v := range row {
			dst[qq*k+kk] = v
		}
	}
	return nil
}

func (s *slab) index(batch, head int) []int {
	idx := make([]int, len(s.prefix))
	copy(idx, s.prefix)
	if s.batchAt >= 0 {
		idx[s.batchAt] = batch
	}
	if s.headAt >= 0 {
		idx[s.headAt] = head
	}
	return idx
}

// ReadAttn copies the attention probabilities of (layer, batch, head) into
// dst as a row-major Queries x Keys matrix.
func (b *Block) ReadAttn(layer, batch, head int, dst []float32) error {
	if err := b.check(layer, batch, head, len(dst)); err != nil {
		return err
	}
	return b.attn[layer].read(batch, head, dst, b.Queries, b.Keys)
}

// ReadGrad copies dL/dA of (layer, batch, head) into dst (Queries x Keys).
func (b *Block) ReadGrad(layer, batch, head int, dst []float32) error {
	if !b.HasGrad {
		return fmt.Errorf("loader: %s: the export has no gradients (%s/grad)", b.Name, b.Name)
	}
	if err := b.check(layer, batch, head, len(dst)); err != nil {
		return err
	}
	return b.grad[layer].read(batch, head, dst, b.Queries, b.Keys)
}

// ReadAllow fills dst (Queries x Keys) with the explicit mask of (batch,
// head): true = may attend. Without an explicit mask every cell is true.
func (b *Block) ReadAllow(batch, head int, dst []bool) error {
	if err := b.check(0, batch, head, len(dst)); err != nil {
		return err
	}
	if b.allow == nil {
		for i := range dst {
			dst[i] = true
		}
		return nil
	}
	return b.allow.read(batch, head, b.Queries, b.Keys, dst)
}

func (a *allowSource) read(batch, head, q, k int, dst []bool) error {
	s := a.shape4
	rank := len(a.arr.Shape())
	// leading axes present in the array (rank-2 of them), broadcast when 1
	var ib [2]int
	idx := ib[:0]
	lead := [2]int{batch, head}
	for i := 4 - rank; i < 2; i++ {
		v := lead[i]
		if s[i] == 1 {
			v = 0
		}
		idx = append(idx, v)
	}
	rows, cols := s[2], s[3]
	bp := getScratch(rows * cols)
	defer matPool.Put(bp)
	buf := *bp
	if err := a.arr.ReadFloat32(idx, buf); err != nil {
		return err
	}
	for qq := 0; qq < q; qq++ {
		r := qq
		if rows == 1 {
			r = 0
		}
		for kk := 0; kk < k; kk++ {
			c := kk
			if cols == 1 {
				c = 0
			}
			v := buf[r*cols+c]
			if a.additive {
				dst[qq*k+kk] = v > -1e4 // -inf and large negative biases block
			} else {
				dst[qq*k+kk] = v != 0
			}
		}
	}
	return nil
}

// ReadOut copies the activations of (layer, batch) into dst as a row-major
// Positions x Features matrix.
func (b *Block) ReadOut(layer, batch int, dst []float32) error {
	if b.OutLayers == 0 {
		return fmt.Errorf("loader: %s: the export has no activations (%s/out)", b.Name, b.Name)
	}
	if layer < 0 || layer >= b.OutLayers || batch < 0 || batch >= b.Batch {
		return fmt.Errorf("loader: %s: out layer %d batch %d out of range [%d, %d]", b.Name, layer, batch, b.OutLayers, b.Batch)
	}
	if len(dst) != b.Positions*b.Features {
		return fmt.Errorf("loader: %s: buffer of %d values, need %d x %d", b.Name, len(dst), b.Positions, b.Features)
	}
	return b.out[layer].read(batch, 0, dst, b.Positions, b.Features)
}

// VocabText returns the text of vocabulary index i of the vocab array, ""
// without one or when i is outside it. It reads the array: a vocabulary is
// read by what shows a prediction, not by every open of an example.
func (e *Export) VocabText(i int) (string, error) {
	if e.Vocab == nil || i < 0 || i >= e.Vocab.Shape()[0] {
		return "", nil
	}
	v, err := e.Vocab.ReadStrings()
	if err != nil {
		return "", err
	}
	return v[i], nil
}
