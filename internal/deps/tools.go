//go:build tools

package deps

import (
	_ "charm.land/bubbles/v2/help"
	_ "charm.land/bubbles/v2/key"
	_ "charm.land/bubbles/v2/progress"
	_ "charm.land/bubbles/v2/textinput"
	_ "charm.land/bubbletea/v2"
	_ "charm.land/lipgloss/v2"
	_ "charm.land/ssh"
	_ "charm.land/wish/v2"
	_ "charm.land/wish/v2/bubbletea"
	_ "github.com/charmbracelet/colorprofile"
	_ "github.com/charmbracelet/x/exp/teatest/v2"
	_ "github.com/edsrzf/mmap-go"
	_ "github.com/spf13/cobra"
	_ "github.com/x448/float16"
	_ "golang.org/x/image/font/gofont/goregular"
	_ "gonum.org/v1/hdf5"
)
