package fleet

import (
	"bytes"
	"runtime"
	"sync"

	"go.yaml.in/yaml/v3"
)

// A fleet file of 10,000 units is about 6 MB of text and a million YAML
// nodes; built as one tree it took the service's memory to 370 MiB at
// start. A file of the plain shape (a top-level "units:" key on a line of
// its own, its items in block style at one indentation, no anchors or
// aliases) is instead split into the text of each item, and each item
// is parsed, decoded and dropped in turn: the lines of every diagnostic
// are the file's own, and a file the split cannot read exactly (any
// '&', '*', tab or carriage return, several documents, a flow-style or
// repeated units: key, an item that does not parse alone) is decoded as
// one tree, as before, with the same diagnostics.

// unitChunk is the text of one item of the units: list.
type unitChunk struct {
	line       int // the file's line of its first line (1-based)
	start, end int // its bytes in the file
}

// splitUnits returns the file with the items of its units: list blanked
// (their lines left empty, so that line numbers stay) and the items'
// text, or ok false when the file is not of the plain shape.
func splitUnits(data []byte) (skeleton []byte, chunks []unitChunk, ok bool) {
	if bytes.ContainsAny(data, "&*\t\r") {
		return nil, nil, false
	}
	const (
		before = iota // the units: key not met yet
		inside        // in its block
		after         // past it
	)
	state, indent := before, -1
	skeleton = make([]byte, 0, 4096)
	lineNo := 0
	for pos := 0; pos < len(data); {
		end := bytes.IndexByte(data[pos:], '\n')
		next := pos + end + 1
		if end < 0 {
			end, next = len(data)-pos, len(data)
		}
		line := data[pos : pos+end]
		lineNo++
		content := bytes.TrimLeft(line, " ")
		depth := len(line) - len(content)
		blank := len(content) == 0 || content[0] == '#'
		if depth == 0 && (bytes.HasPrefix(line, []byte("---")) || bytes.HasPrefix(line, []byte("...")) || bytes.HasPrefix(line, []byte("%"))) {
			return nil, nil, false // document markers and directives
		}
		if state == inside && !blank && depth == 0 && content[0] != '-' {
			state = after // the next top-level key
		}
		switch {
		case state != inside && depth == 0 && bytes.HasPrefix(line, []byte("units:")):
			rest := bytes.TrimLeft(line[len("units:"):], " ")
			if state != before || len(rest) > 0 && rest[0] != '#' {
				return nil, nil, false // a second units: key, or a flow-style list
			}
			state = inside
			skeleton = append(skeleton, line...)
			skeleton = append(skeleton, '\n')
		case state == inside && blank:
			if len(chunks) > 0 {
				chunks[len(chunks)-1].end = next // a comment or blank line goes with the item before it
			}
			skeleton = append(skeleton, '\n')
		case state == inside:
			item := content[0] == '-' && (len(content) == 1 || content[1] == ' ')
			switch {
			case indent < 0 && item:
				indent = depth
			case indent < 0 || depth < indent || depth == indent && !item:
				return nil, nil, false
			}
			if depth == indent {
				chunks = append(chunks, unitChunk{line: lineNo, start: pos})
			}
			chunks[len(chunks)-1].end = next
			skeleton = append(skeleton, '\n')
		default:
			skeleton = append(skeleton, line...)
			skeleton = append(skeleton, '\n')
		}
		pos = next
	}
	if len(chunks) == 0 {
		return nil, nil, false
	}
	return skeleton, chunks, true
}

// decodeChunks decodes the units: list item by item (d.chunks). The
// YAML parsing, most of the work, runs on every core ahead of the
// decoding, which takes the items in file order: a worker per core parses
// the batches of its turn (b modulo the workers; a batch is chunkBatch
// neighbouring items, parsed at once to spare the parser's set-up) into
// a small queue of its own, so at most a few hundred items' trees exist
// at once.
func (d *decoder) decodeChunks() {
	batches := (len(d.chunks) + chunkBatch - 1) / chunkBatch
	workers := min(runtime.GOMAXPROCS(0), 8, batches)
	queues := make([]chan []*yaml.Node, workers) // nil: the batch did not parse as its items
	done := make(chan struct{})
	var wg sync.WaitGroup
	for w := range workers {
		queues[w] = make(chan []*yaml.Node, 4)
		wg.Add(1)
		go func() {
			defer wg.Done()
			for b := w; b < batches; b += workers {
				items := parseChunks(d.text, d.chunks[b*chunkBatch:min((b+1)*chunkBatch, len(d.chunks))])
				select {
				case queues[w] <- items:
				case <-done:
					return
				}
			}
		}()
	}
	defer wg.Wait()
	defer close(done)
	for b := range batches {
		items := <-queues[b%workers]
		if items == nil {
			d.splitFailed = true
			return
		}
		for j, item := range items {
			if !d.unitItem(b*chunkBatch+j, item) {
				return
			}
		}
	}
}

// chunkBatch is how many neighbouring items are parsed at once.
const chunkBatch = 32

// parseChunks parses neighbouring items of the file at once into their
// nodes, with the file's line numbers, or returns nil when their text is
// not exactly these list items.
func parseChunks(file []byte, chunks []unitChunk) []*yaml.Node {
	var doc yaml.Node
	text := file[chunks[0].start:chunks[len(chunks)-1].end]
	if err := yaml.Unmarshal(text, &doc); err != nil || doc.Kind != yaml.DocumentNode || len(doc.Content) != 1 {
		return nil
	}
	seq := doc.Content[0]
	if seq.Kind != yaml.SequenceNode || len(seq.Content) != len(chunks) {
		return nil
	}
	for i, item := range seq.Content {
		shiftLines(item, chunks[0].line-1)
		if item.Line != chunks[i].line {
			return nil // an item is not where the split put it
		}
	}
	return seq.Content
}

// shiftLines adds offset to the line of n and every node under it.
func shiftLines(n *yaml.Node, offset int) {
	n.Line += offset
	for _, c := range n.Content {
		shiftLines(c, offset)
	}
}
