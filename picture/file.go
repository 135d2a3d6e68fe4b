package picture

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"strings"

	"github.com/charmbracelet/colorprofile"
	"github.com/heed-dev/heed/views"
)

// MarkerPrefix starts the marker heed writes into every render: the PNG tEXt
// "Software" entry, the comment after the SVG's XML declaration, the first
// line of a text render. WriteFile replaces an existing file without --force
// only when it carries the marker.
const MarkerPrefix = "heed render"

// Format is a picture's file format.
type Format string

// The formats, named by their usual extension.
const (
	FormatPNG Format = "png"
	FormatSVG Format = "svg"
	FormatTXT Format = "txt"
)

// FormatOf returns the format for a file name's extension (.png, .svg, .txt).
func FormatOf(path string) (Format, error) {
	switch strings.ToLower(filepath.Ext(path)) {
	case ".png":
		return FormatPNG, nil
	case ".svg":
		return FormatSVG, nil
	case ".txt":
		return FormatTXT, nil
	}
	return "", fmt.Errorf("%s: unknown picture format %q: use .png, .svg or .txt", path, filepath.Ext(path))
}

// Text renders the canvas as text: the marker line, then the canvas's lines,
// each ending in "\n". With colour, cells carry true-colour SGR sequences
// (views.Canvas.String); without, none at all (views.Canvas.Plain, trailing
// spaces dropped), and the
// canvas should have been drawn for a profile without colour so that its
// glyph ramp carries the values.
func Text(c *views.Canvas, colour bool, opt Options) []byte {
	var b bytes.Buffer
	b.WriteString("# " + strings.ReplaceAll(opt.marker(), "\n", " ") + "\n")
	if colour {
		b.WriteString(c.Render(colorprofile.TrueColor))
	} else {
		// Lines end at their last glyph: a canvas is as wide as its widest line.
		lines := strings.Split(c.Plain(), "\n")
		for i, l := range lines {
			lines[i] = strings.TrimRight(l, " ")
		}
		b.WriteString(strings.Join(lines, "\n"))
	}
	b.WriteString("\n")
	return b.Bytes()
}

// Encode produces the bytes of the canvas in format f.
func Encode(c *views.Canvas, f Format, colour bool, opt Options) ([]byte, error) {
	switch f {
	case FormatPNG:
		return PNG(c, opt)
	case FormatSVG:
		return SVG(c, opt)
	case FormatTXT:
		return Text(c, colour, opt), nil
	}
	return nil, fmt.Errorf("picture: unknown format %q", f)
}

// IsRender reports whether the file at path is a previous heed render of
// its format: PNG with a tEXt "Software" entry starting with MarkerPrefix,
// SVG whose first comment starts with it, text whose first line is
// "# " + MarkerPrefix...
func IsRender(path string) (bool, error) {
	f, err := os.Open(path)
	if err != nil {
		return false, err
	}
	defer f.Close()
	head := make([]byte, 64<<10)
	n, err := io.ReadFull(f, head)
	if err != nil && !errors.Is(err, io.ErrUnexpectedEOF) && !errors.Is(err, io.EOF) {
		return false, err
	}
	head = head[:n]
	switch {
	case bytes.HasPrefix(head, pngSig):
		txt, err := PNGText(head)
		if err != nil && len(txt) == 0 {
			return false, nil
		}
		return strings.HasPrefix(txt["Software"], MarkerPrefix), nil
	case bytes.HasPrefix(head, []byte("<?xml")):
		line2 := head
		if i := bytes.IndexByte(head, '\n'); i >= 0 {
			line2 = head[i+1:]
		}
		return bytes.HasPrefix(line2, []byte("<!-- "+MarkerPrefix)), nil
	default:
		line, _ := bufio.NewReader(bytes.NewReader(head)).ReadString('\n')
		return strings.HasPrefix(line, "# "+MarkerPrefix), nil
	}
}

// ErrExists is returned (wrapped) by WriteFile when the file exists and is
// not a previous render.
var ErrExists = errors.New("exists and is not a heed render")

// WriteFile writes data to path atomically: into a temporary file in the
// same directory, synced, then renamed over path, so a reader sees the old
// file or the new one and never a part. An existing path is replaced only
// when force is set or when it is a previous heed render (IsRender); it must
// be a regular file either way.
func WriteFile(path string, data []byte, force bool) error {
	st, err := os.Lstat(path)
	switch {
	case err == nil:
		if !st.Mode().IsRegular() {
			return fmt.Errorf("%s: not a regular file; refusing to replace it", path)
		}
		if !force {
			ok, err := IsRender(path)
			if err != nil {
				return fmt.Errorf("%s: %w", path, err)
			}
			if !ok {
				return fmt.Errorf("%s %w (use --force to replace it)", path, ErrExists)
			}
		}
	case !errors.Is(err, fs.ErrNotExist):
		return err
	}
	dir := filepath.Dir(path)
	tmp, err := os.CreateTemp(dir, "."+filepath.Base(path)+".tmp-*")
	if err != nil {
		return fmt.Errorf("write %s: %w", path, err)
	}
	name := tmp.Name()
	fail := func(err error) error {
		tmp.Close()
		os.Remove(name)
		return fmt.Errorf("write %s: %w", path, err)
	}
	if _, err := tmp.Write(data); err != nil {
		return fail(err)
	}
	if err := tmp.Sync(); err != nil {
		return fail(err)
	}
	// CreateTemp makes the file 0600; a picture is for sharing.
	if err := tmp.Chmod(0o644); err != nil {
		return fail(err)
	}
	if err := tmp.Close(); err != nil {
		os.Remove(name)
		return fmt.Errorf("write %s: %w", path, err)
	}
	if err := os.Rename(name, path); err != nil {
		os.Remove(name)
		return fmt.Errorf("write %s: %w", path, err)
	}
	return nil
}
