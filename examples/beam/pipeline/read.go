package pipeline

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/io/fileio"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"

	"lowerbound.dev/examples/beam/tabular"
)

func init() {
	register.DoFn4x1[context.Context, fileio.ReadableFile, func(tabular.Record), func(tabular.DeadLetter), error](&readFn{})
	register.Emitter1[tabular.Record]()
	register.Emitter1[tabular.DeadLetter]()
	beam.RegisterType(typeOf[tabular.Record]())
	beam.RegisterType(typeOf[tabular.DeadLetter]())
}

// Counter names (namespace "lowerbound").
const (
	Namespace       = "lowerbound"
	CounterLines    = "lines_read"     // data lines read (header and blank lines excluded)
	CounterRecords  = "records_parsed" // lines that became records
	CounterScored   = "records_scored"
	CounterFlagged  = "records_flagged"
	CounterDead     = "dead_letters"
	deadKindCounter = "dead_letters_" // + tabular.Kind*
)

// ReadRecords matches glob and reads every file into records and dead
// letters.
func ReadRecords(s beam.Scope, glob string, cfg tabular.ParserConfig) (records, dead beam.PCollection) {
	s = s.Scope("ReadRecords")
	files := fileio.ReadMatches(s, fileio.MatchFiles(s, glob, fileio.MatchEmptyDisallow()))
	return beam.ParDo2(s, &readFn{Features: cfg.Features, IDColumn: cfg.IDColumn, Comma: cfg.Comma}, files)
}

// readFn reads one file. A file is read by one worker from start to end,
// which keeps line numbers exact; inputs are meant to come in many files.
type readFn struct {
	Features []string
	IDColumn string
	Comma    rune
}

func (f *readFn) ProcessElement(ctx context.Context, file fileio.ReadableFile, emit func(tabular.Record), emitDead func(tabular.DeadLetter)) error {
	rc, err := file.Open(ctx)
	if err != nil {
		return fmt.Errorf("open %s: %w", file.Metadata.Path, err)
	}
	defer rc.Close()
	lines := beam.NewCounter(Namespace, CounterLines)
	parsed := beam.NewCounter(Namespace, CounterRecords)
	path := file.Metadata.Path
	r := bufio.NewReaderSize(rc, 1<<16)
	var p *tabular.Parser
	var line int64
	for {
		text, tooLong, err := readLine(r)
		if err == io.EOF && text == "" && !tooLong {
			break
		}
		if err != nil && err != io.EOF {
			// A read error fails the bundle, so the runner retries it.
			return fmt.Errorf("read %s after line %d: %w", path, line, err)
		}
		line++
		if line == 1 {
			if tooLong {
				text = ""
			}
			if p, err = tabular.NewParser(path, text, tabular.ParserConfig{Features: f.Features, IDColumn: f.IDColumn, Comma: f.Comma}); err != nil {
				return err
			}
			if d := p.HeaderProblem(); d != nil {
				deadLetter(ctx, emitDead, *d)
			}
		} else {
			lines.Inc(ctx, 1)
			if tooLong {
				deadLetter(ctx, emitDead, tabular.DeadLetter{File: path, Line: line, Kind: tabular.KindLineLength,
					Reason: fmt.Sprintf("line longer than %d bytes", tabular.MaxLineBytes)})
			} else if rec, d, ok := p.Parse(line, text); ok {
				parsed.Inc(ctx, 1)
				emit(rec)
			} else if d != nil {
				deadLetter(ctx, emitDead, *d)
			} else {
				lines.Dec(ctx, 1) // a blank line is not a data line
			}
		}
		if err == io.EOF {
			break
		}
	}
	if line == 0 {
		deadLetter(ctx, emitDead, tabular.DeadLetter{File: path, Line: 1, Kind: tabular.KindHeader, Reason: "empty file: no header line"})
	}
	return nil
}

// readLine reads one line without its newline. A line longer than
// tabular.MaxLineBytes is consumed and reported with tooLong.
func readLine(r *bufio.Reader) (text string, tooLong bool, err error) {
	var buf []byte
	for {
		chunk, err := r.ReadSlice('\n')
		if !tooLong {
			if len(buf)+len(chunk) > tabular.MaxLineBytes+1 {
				tooLong, buf = true, nil
			} else {
				buf = append(buf, chunk...)
			}
		}
		if errors.Is(err, bufio.ErrBufferFull) {
			continue
		}
		if len(buf) > 0 && buf[len(buf)-1] == '\n' {
			buf = buf[:len(buf)-1]
		}
		return string(buf), tooLong, err
	}
}

// deadLetter counts and emits one dead letter.
func deadLetter(ctx context.Context, emit func(tabular.DeadLetter), d tabular.DeadLetter) {
	beam.NewCounter(Namespace, CounterDead).Inc(ctx, 1)
	beam.NewCounter(Namespace, deadKindCounter+d.Kind).Inc(ctx, 1)
	emit(d)
}
