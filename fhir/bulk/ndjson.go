package bulk

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
)

// MaxLineBytes bounds one NDJSON line. A longer line is reported and
// skipped rather than read into memory whole.
const MaxLineBytes = 16 << 20

// ReadLine returns the next line of r without its newline. A line over max
// bytes is consumed and reported as too long, so one bad line cannot make a
// reader hold a whole file. The line may point into r's buffer: it is valid
// until the next read.
func ReadLine(r *bufio.Reader, max int) (line []byte, tooLong bool, err error) {
	var buf []byte
	for {
		chunk, err := r.ReadSlice('\n')
		if buf == nil && !tooLong && !errors.Is(err, bufio.ErrBufferFull) {
			// The common case: the whole line is in the reader's buffer and
			// the caller copies what it keeps, so no copy is needed here.
			return bytes.TrimRight(chunk, "\r\n"), false, err
		}
		if len(buf)+len(chunk) > max {
			tooLong = true
			buf = buf[:0]
		} else if !tooLong {
			buf = append(buf, chunk...)
		}
		if errors.Is(err, bufio.ErrBufferFull) {
			continue
		}
		return bytes.TrimRight(buf, "\r\n"), tooLong, err
	}
}

// ErrLineTooLong is passed to EachLine's callback for a line over
// MaxLineBytes.
var ErrLineTooLong = fmt.Errorf("line longer than %d bytes", MaxLineBytes)

// EachLine calls fn with the number and content of every non-blank line of
// r (the content is valid only during the call), or with ErrLineTooLong
// and no content for a line over MaxLineBytes; it stops at the first error
// fn returns.
func EachLine(r io.Reader, fn func(n int, line []byte, tooLong error) error) error {
	br := bufio.NewReaderSize(r, 1<<20)
	for n := 1; ; n++ {
		line, tooLong, err := ReadLine(br, MaxLineBytes)
		if err != nil && !errors.Is(err, io.EOF) {
			return fmt.Errorf("read: %w", err)
		}
		switch {
		case tooLong:
			if ferr := fn(n, nil, ErrLineTooLong); ferr != nil {
				return ferr
			}
		case len(bytes.TrimSpace(line)) > 0:
			if ferr := fn(n, line, nil); ferr != nil {
				return ferr
			}
		}
		if errors.Is(err, io.EOF) {
			return nil
		}
	}
}
