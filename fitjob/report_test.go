package fitjob

import (
	"bytes"
	"context"
	"encoding/xml"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"
)

// reportFixture replays the small input under two parameter sets and the
// what-if grid and returns the report's path and bytes.
func reportFixture(t *testing.T) (string, []byte) {
	t.Helper()
	_, _, dir := runReplay(t, replayInput, ReplayOptions{
		Params:   []NamedParams{loadParams(t, "params-a.json"), loadParams(t, "params-b.json")},
		Policies: fixturePolicies,
	})
	path := filepath.Join(dir, "report.html")
	return path, readFile(t, path)
}

// The elements the report may use: HTML and the SVG that gonum's vgsvg
// writes. Anything else (a script, a link, an image) would be a mistake.
var reportElements = map[string]bool{
	"html": true, "head": true, "meta": true, "title": true, "style": true, "body": true, "header": true, "footer": true,
	"section": true, "h1": true, "h2": true, "h3": true, "p": true, "div": true, "dl": true, "dt": true, "dd": true,
	"table": true, "thead": true, "tbody": true, "tr": true, "th": true, "td": true, "code": true, "figure": true,
	"svg": true, "g": true, "path": true, "text": true, "defs": true,
}

// The report is a well-formed document (the whole file parses as XML,
// strictly: every element closed, no unknown entities), uses only the
// expected elements, has every section, one plot per skill plus the
// calibration and distribution plots, each a well-formed SVG with drawn
// paths, and refers to nothing outside itself: no scripts, links, images,
// URLs or font files.
func TestReportHTMLWellFormed(t *testing.T) {
	_, b := reportFixture(t)
	if !bytes.HasPrefix(b, []byte("<!DOCTYPE html>\n<html")) {
		t.Fatalf("report starts %q", b[:min(40, len(b))])
	}
	d := xml.NewDecoder(bytes.NewReader(b))
	d.Strict = true
	var stack []string
	ids := map[string]bool{}
	svgs, paths, drawn, texts := 0, 0, 0, 0
	inSVG := 0
	for {
		tok, err := d.Token()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatalf("report.html is not well-formed: %v", err)
		}
		switch tk := tok.(type) {
		case xml.StartElement:
			name := tk.Name.Local
			if !reportElements[name] {
				t.Errorf("unexpected element <%s> inside %v", name, stack)
			}
			stack = append(stack, name)
			for _, a := range tk.Attr {
				if a.Name.Local == "id" {
					ids[a.Value] = true
				}
				v := strings.ToLower(a.Value)
				if (a.Name.Local == "href" || a.Name.Local == "src") || strings.Contains(v, "url(") ||
					(strings.Contains(v, "http") && a.Name.Space != "xmlns" && a.Name.Local != "xmlns") {
					t.Errorf("<%s %s=%q>: refers outside the file", name, a.Name.Local, a.Value)
				}
			}
			switch name {
			case "svg":
				svgs++
				inSVG++
			case "path":
				paths++
				for _, a := range tk.Attr {
					if a.Name.Local == "d" && len(a.Value) > 10 {
						drawn++
					}
				}
			case "text":
				if inSVG > 0 {
					texts++
				}
			}
		case xml.EndElement:
			if tk.Name.Local == "svg" {
				inSVG--
			}
			stack = stack[:len(stack)-1]
		}
	}
	if len(stack) != 0 {
		t.Fatalf("unclosed elements: %v", stack)
	}
	for _, id := range []string{"data", "quality", "skills", "curves", "calibration", "mastery", "whatif", "rejected"} {
		if !ids[id] {
			t.Errorf("no section with id %q", id)
		}
	}
	if want := 4 + 2; svgs != want {
		t.Errorf("%d plots, want %d (4 learning curves, calibration, distribution)", svgs, want)
	}
	if drawn < 6*5 || texts < 6*5 {
		t.Errorf("%d paths (%d with data), %d texts in the plots; too few for drawn plots", paths, drawn, texts)
	}
	s := string(b)
	for _, bad := range []string{"<script", "<link", "<img", "<iframe", "@import", "@font-face", "url(", "<?xml", "base64"} {
		if strings.Contains(strings.ToLower(s), bad) {
			t.Errorf("report contains %q", bad)
		}
	}
	for _, want := range []string{"@media print", "2025-09-01T18:00:00Z", "2025-09-27T19:01:00Z", "version 3", "version 4",
		"params-a.json", "params-b.json", "Parameter sets compared", "line 1472", "journal-entries", "trial-balance"} {
		if !strings.Contains(s, want) {
			t.Errorf("report lacks %q", want)
		}
	}
	// Each SVG on its own is a well-formed SVG document.
	for i, svg := range extractSVGs(t, b) {
		d := xml.NewDecoder(bytes.NewReader(svg))
		d.Strict = true
		var root string
		for {
			tok, err := d.Token()
			if err == io.EOF {
				break
			}
			if err != nil {
				t.Fatalf("plot %d is not well-formed SVG: %v", i, err)
			}
			if se, ok := tok.(xml.StartElement); ok && root == "" {
				root = se.Name.Local
				if se.Name.Space != "http://www.w3.org/2000/svg" {
					t.Errorf("plot %d: root namespace %q", i, se.Name.Space)
				}
			}
		}
		if root != "svg" {
			t.Errorf("plot %d: root element %q", i, root)
		}
	}
}

var svgRE = regexp.MustCompile(`(?s)<svg .*?</svg>`)

func extractSVGs(t *testing.T, html []byte) [][]byte {
	t.Helper()
	svgs := svgRE.FindAll(html, -1)
	if len(svgs) == 0 {
		t.Fatal("no <svg> in the report")
	}
	return svgs
}

// chromium finds Debian's chromium. Outside CI a missing browser skips the
// test loudly; in CI (CI=true) it fails.
func chromium(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"chromium", "chromium-browser"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	msg := "chromium is not installed: the report was NOT rendered in a browser (apt-get install -y chromium)"
	if os.Getenv("CI") == "true" {
		t.Fatal(msg)
	}
	fmt.Fprintln(os.Stderr, "\n!!!!!!!! SKIPPED: "+msg+" !!!!!!!!")
	t.Skip("SKIPPED LOUDLY: " + msg)
	return ""
}

// runChromium runs headless Chromium on url with a fresh profile and no
// network services, and returns its standard output.
func runChromium(t *testing.T, bin string, args ...string) []byte {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	base := []string{"--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
		"--disable-background-networking", "--disable-component-update", "--disable-sync",
		"--user-data-dir=" + t.TempDir()}
	cmd := exec.CommandContext(ctx, bin, append(base, args...)...)
	var out, errb bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &errb
	if err := cmd.Run(); err != nil {
		t.Fatalf("chromium %v: %v\n%s", args, err, errb.String())
	}
	return out.Bytes()
}

// Headless Chromium renders the report: its DOM holds every plot with its
// paths, each plot drawn on its own fills its box with ink of several
// colours (an empty box beside them stays blank, so the check can fail),
// and the page prints to PDF.
func TestReportRendersInChromium(t *testing.T) {
	bin := chromium(t)
	path, b := reportFixture(t)

	dom := string(runChromium(t, bin, "--dump-dom", "file://"+path))
	if !strings.Contains(dom, "</html>") || !strings.Contains(dom, "Replay report") {
		t.Fatalf("chromium's DOM is not the report (%d bytes)", len(dom))
	}
	if n := strings.Count(dom, "<svg "); n != 6 {
		t.Errorf("chromium's DOM has %d svg elements, want 6", n)
	}
	if n := strings.Count(dom, "<path "); n < 6*5 {
		t.Errorf("chromium's DOM has %d paths", n)
	}

	// Every plot alone in a 400×300 box on a grid; the last box is empty.
	svgs := extractSVGs(t, b)
	const cw, ch, cols = 400, 300, 3
	var page strings.Builder
	page.WriteString(`<!DOCTYPE html><html><head><meta charset="utf-8"/><style>body{margin:0;background:#fff}div{position:absolute;width:400px;height:300px;overflow:hidden}svg{width:400px;height:300px;display:block}</style></head><body>`)
	cells := len(svgs) + 1
	for i := 0; i < cells; i++ {
		fmt.Fprintf(&page, `<div style="left:%dpx;top:%dpx">`, (i%cols)*cw, (i/cols)*ch)
		if i < len(svgs) {
			page.Write(svgs[i])
		}
		page.WriteString("</div>")
	}
	page.WriteString("</body></html>")
	dir := t.TempDir()
	grid := filepath.Join(dir, "plots.html")
	if err := os.WriteFile(grid, []byte(page.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	shot := filepath.Join(dir, "plots.png")
	rows := (cells + cols - 1) / cols
	runChromium(t, bin, "--hide-scrollbars", fmt.Sprintf("--window-size=%d,%d", cols*cw, rows*ch), "--screenshot="+shot, "file://"+grid)
	img := decodePNG(t, shot)
	for i := 0; i < cells; i++ {
		r := image.Rect((i%cols)*cw, (i/cols)*ch, (i%cols+1)*cw, (i/cols+1)*ch)
		ink, colours := inkIn(img, r)
		share := float64(ink) / float64(r.Dx()*r.Dy())
		t.Logf("box %d: %.1f%% inked, %d colours", i, 100*share, colours)
		if i < len(svgs) {
			if share < 0.01 || colours < 3 {
				t.Errorf("plot %d: %.2f%% of its box inked, %d colours: not drawn", i, 100*share, colours)
			}
			// The data series, not just the axes: each plot's own colours.
			series := []color.RGBA{colObserved, colPredicted, colSecond} // learning curves
			switch i {
			case len(svgs) - 2:
				series = []color.RGBA{colObserved, colSecond} // calibration
			case len(svgs) - 1:
				series = []color.RGBA{colBars} // distribution
			}
			for _, c := range series {
				if n := pixelsNear(img, r, c); n < 30 {
					t.Errorf("plot %d: only %d pixels of the series colour %v", i, n, c)
				}
			}
		} else if ink != 0 {
			t.Errorf("the empty box has %d inked pixels: the blank check does not work", ink)
		}
	}

	// The whole report: the top of the page is not blank, and it prints.
	full := filepath.Join(dir, "report.png")
	runChromium(t, bin, "--hide-scrollbars", "--window-size=1200,2400", "--screenshot="+full, "file://"+path)
	if ink, _ := inkIn(decodePNG(t, full), image.Rect(0, 0, 1200, 2400)); ink < 10000 {
		t.Errorf("the report's screenshot has only %d inked pixels", ink)
	}
	pdf := filepath.Join(dir, "report.pdf")
	runChromium(t, bin, "--no-pdf-header-footer", "--print-to-pdf="+pdf, "file://"+path)
	if p := readFile(t, pdf); len(p) < 10000 || !bytes.HasPrefix(p, []byte("%PDF")) {
		t.Errorf("printing the report gave %d bytes", len(p))
	}
}

// pixelsNear counts the pixels of r within a small distance of c
// (antialiasing blends the edges of lines).
func pixelsNear(img image.Image, r image.Rectangle, c color.RGBA) int {
	n := 0
	for y := r.Min.Y; y < r.Max.Y; y++ {
		for x := r.Min.X; x < r.Max.X; x++ {
			p := color.RGBAModel.Convert(img.At(x, y)).(color.RGBA)
			if absDiff(p.R, c.R) < 24 && absDiff(p.G, c.G) < 24 && absDiff(p.B, c.B) < 24 {
				n++
			}
		}
	}
	return n
}

func absDiff(a, b uint8) int {
	if a > b {
		return int(a - b)
	}
	return int(b - a)
}

func decodePNG(t *testing.T, path string) image.Image {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	img, err := png.Decode(f)
	if err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	return img
}

// inkIn counts the pixels of r that are not (near) white, and the distinct
// colours among them (quantised to 4 bits a channel).
func inkIn(img image.Image, r image.Rectangle) (ink, colours int) {
	r = r.Intersect(img.Bounds())
	seen := map[color.RGBA]bool{}
	for y := r.Min.Y; y < r.Max.Y; y++ {
		for x := r.Min.X; x < r.Max.X; x++ {
			c := color.RGBAModel.Convert(img.At(x, y)).(color.RGBA)
			if c.R > 0xf0 && c.G > 0xf0 && c.B > 0xf0 {
				continue
			}
			ink++
			seen[color.RGBA{c.R >> 4, c.G >> 4, c.B >> 4, 0}] = true
		}
	}
	return ink, len(seen)
}
