package backfill

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
)

// Deletions counts what the input lists as deleted: the DELETE entries of
// an export's deleted files, or of Bundles in local NDJSON files. The
// receipt says what the engine did with them: applied (an Observation the
// store held is withdrawn), older than a version held (the resource was
// written again after it), or not held (nothing to do).
type Deletions struct {
	// Files are the export's deleted files read.
	Files int
	// Listed are the DELETE entries read and handed to the engine.
	Listed int
	engine.DeletionReceipt
}

// deletions are read before the resources and applied after them. Before,
// so that reading the resources can note the versions the input carries
// of each deleted resource (for a deletion that gives no time); after,
// because the engine applies a deletion only to what the store holds.
// They are kept in memory (bulk.Listed: one small record per DELETE
// entry), with the rule that places them in time.
type deletions struct {
	*bulk.Listed
	// lines are the lines of local files read as deletions, which are
	// not resources to store (file index, line number).
	lines map[[2]int]bool
}

func newDeletions() *deletions {
	return &deletions{Listed: bulk.NewListed(), lines: map[[2]int]bool{}}
}

// carries notes a version of a resource the input carries, with its
// meta.lastUpdated as written (one that is not an instant counts as none).
func (d *deletions) carries(logical string, lastUpdated string) {
	t, err := time.Parse(time.RFC3339Nano, lastUpdated)
	if err != nil {
		t = time.Time{}
	}
	d.Carries(logical, t)
}

// readDeletions reads one file's Bundles of DELETE entries. In an export's
// deleted file every line must be one, and any other line is skipped with
// its file and line; in a local file only the lines that are Bundles of
// DELETE entries are read (and left out of the resources), the others are
// resources for ingestFile. An entry that cannot be applied is skipped
// with its file, line and position, and the line's other entries, and the
// file's other lines, are still applied. Nothing says which resource.
func readDeletions(ctx context.Context, name string, fileIndex int, exportFile bool, d *deletions, sum *Summary, log *slog.Logger) error {
	f, err := os.Open(name)
	if err != nil {
		return fmt.Errorf("backfill: deletions: %w", err)
	}
	defer f.Close()
	base := filepath.Base(name)
	bundle := []byte(`"Bundle"`)
	err = bulk.EachLine(f, func(n int, line []byte, tooLong error) error {
		if err := ctx.Err(); err != nil {
			return err
		}
		if tooLong != nil {
			if exportFile {
				sum.skip(fmt.Sprintf("%s:%d: %v", base, n, tooLong))
				log.WarnContext(ctx, "a line of a deleted file was skipped", "file", base, "line", n, "err", tooLong)
			}
			return nil
		}
		if !exportFile && !bytes.Contains(line, bundle) {
			return nil
		}
		ds, err := bulk.ParseDeletions(line)
		if errors.Is(err, bulk.ErrNotDeletions) && !exportFile {
			return nil
		}
		if !exportFile {
			d.lines[[2]int{fileIndex, n}] = true
		}
		d.Add(ds...)
		if err != nil {
			msg := strings.ReplaceAll(err.Error(), "\n", "; ")
			sum.skip(fmt.Sprintf("%s:%d: %s", base, n, msg))
			log.WarnContext(ctx, "deletions that could not be read were skipped; the rest of the file is applied",
				"file", base, "line", n, "applied_from_line", len(ds), "err", msg)
		}
		return nil
	})
	if err != nil {
		if ctx.Err() != nil {
			return fmt.Errorf("backfill: reading %s: %w", base, ctx.Err())
		}
		return fmt.Errorf("backfill: reading %s: %w", base, err)
	}
	return nil
}

// applyDeletions hands the deletions to the engine (Engine.Deleted, the
// live service's path), in batches, each placed in time by bulk.Listed's
// rule: a deletion placed in time by its entry keeps that time, and the
// engine's version order decides between it and the versions held; one
// without a time goes just before the latest version the input carries
// (which stands), or at an export's transactionTime, or, for local files
// that do not carry it, when it is applied.
func applyDeletions(ctx context.Context, eng *engine.Engine, d *deletions, transactionTime time.Time, batchSize int, p *progress, sum *Summary) error {
	batch := make([]engine.Deletion, 0, batchSize)
	flush := func() error {
		if len(batch) == 0 {
			return nil
		}
		rec, err := eng.Deleted(ctx, batch)
		if err != nil {
			return fmt.Errorf("backfill: deletions: %w", err)
		}
		sum.Deletions.Listed += len(batch)
		sum.Deletions.Applied += rec.Applied
		sum.Deletions.Older += rec.Older
		sum.Deletions.NotHeld += rec.NotHeld
		p.deletions.Add(int64(len(batch)))
		batch = batch[:0]
		return nil
	}
	from := "a Bundle of DELETE entries in a backfill input file lists it"
	if !transactionTime.IsZero() {
		from = "a Bulk Data export's deleted file lists it"
	}
	for _, pd := range d.Placed(transactionTime) {
		if err := ctx.Err(); err != nil {
			return fmt.Errorf("backfill: deletions: %w", err)
		}
		if pd.Placement == bulk.CarriedStands {
			// The version the input carries has no time to place the
			// deletion before: it stands, as a newer one would.
			sum.Deletions.Listed++
			sum.Deletions.Older++
			p.deletions.Add(1)
			continue
		}
		batch = append(batch, engine.Deletion{Ref: pd.Ref(), At: pd.At, How: pd.Placement.How(from)})
		if len(batch) >= batchSize {
			if err := flush(); err != nil {
				return err
			}
		}
	}
	return flush()
}
