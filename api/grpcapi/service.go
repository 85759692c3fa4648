package grpcapi

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/base64"
	"encoding/hex"
	"encoding/json"
	"errors"
	"strconv"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// Submission mode, as the engine counts it.
const modeGRPC = "grpc"

// Page sizes of ListDerivations.
const (
	defaultPageSize = 50
	maxPageSize     = 500
)

// watchBatch is how many feed events a watch reads at a time.
const watchBatch = 256

// resources gathers a request's resources and, for NDJSON, the zero-based
// line of each, so errors and rejections can name the line.
func resources(list [][]byte, ndjson []byte) ([]json.RawMessage, []int, error) {
	switch {
	case len(list) > 0 && len(ndjson) > 0:
		return nil, nil, badRequest("give resources or ndjson, not both")
	case len(list) > 0:
		out := make([]json.RawMessage, len(list))
		for i, r := range list {
			out[i] = r
		}
		return out, nil, nil
	case len(ndjson) == 0:
		return nil, nil, badRequest("no resources: give resources or ndjson")
	}
	var out []json.RawMessage
	var lines []int
	for n, line := range bytes.Split(ndjson, []byte{'\n'}) {
		line = bytes.TrimRight(line, "\r")
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		out = append(out, line)
		lines = append(lines, n)
	}
	if len(out) == 0 {
		return nil, nil, badRequest("ndjson holds no resources")
	}
	return out, lines, nil
}

// position names resource i as the client sent it: its index, or its
// line for NDJSON.
func position(i int, lines []int) (int, string) {
	if lines == nil {
		return i, "resource " + strconv.Itoa(i)
	}
	return lines[i], "ndjson line " + strconv.Itoa(lines[i]+1)
}

// resourceError restates an engine.ResourceError with the position the
// client knows.
func resourceError(err error, lines []int) error {
	var re *engine.ResourceError
	if !errors.As(err, &re) {
		return err
	}
	_, where := position(re.Index, lines)
	return badRequest("%s: %v", where, re.Err)
}

// Compute implements pb.DeadSpaceServer.
func (s *Server) Compute(ctx context.Context, req *pb.ComputeRequest) (*pb.ComputeResponse, error) {
	res, lines, err := resources(req.GetResources(), req.GetNdjson())
	if err != nil {
		return nil, s.status(ctx, err)
	}
	rep, err := s.eng.Compute(ctx, res)
	if err != nil {
		return nil, s.status(ctx, resourceError(err, lines))
	}
	out := &pb.ComputeResponse{
		InputsLeftOut: omissions(rep.Inputs), ValuesNotEmitted: omissions(rep.Values),
		Unrecognised: int64(rep.Unrecognised),
	}
	for _, r := range rep.Results {
		pr, err := result(r)
		if err != nil {
			return nil, s.status(ctx, err)
		}
		out.Results = append(out.Results, pr)
	}
	if out.Device, err = s.eng.Device(); err != nil {
		return nil, s.status(ctx, err)
	}
	return out, nil
}

// Submit implements pb.DeadSpaceServer.
func (s *Server) Submit(ctx context.Context, req *pb.SubmitRequest) (*pb.SubmitResponse, error) {
	res, lines, err := resources(req.GetResources(), req.GetNdjson())
	if err != nil {
		return nil, s.status(ctx, err)
	}
	rec, err := s.eng.IngestChecked(ctx, modeGRPC, res)
	if err != nil {
		return nil, s.status(ctx, resourceError(err, lines))
	}
	out := &pb.SubmitResponse{Accepted: int32(rec.Accepted), Ignored: int32(rec.Ignored)}
	for _, r := range rec.Rejected {
		i, _ := position(r.Index, lines)
		out.Rejected = append(out.Rejected, &pb.Rejection{Index: int32(i), Reason: string(r.Reason), Detail: r.Detail})
	}
	return out, nil
}

// subject accepts "Patient/x" or "x".
func subject(s string) (string, error) {
	id := strings.TrimPrefix(s, "Patient/")
	if s == "" {
		return "", badRequest("subject is required")
	}
	if !fhirref.IsID(id) {
		return "", badRequest("subject %q: want Patient/ and a FHIR id", s)
	}
	return "Patient/" + id, nil
}

// observationRef accepts "x", "Observation/x" and either with a
// "/_history/v" suffix, and returns the reference and the bare id.
func observationRef(s string) (ref, id string, err error) {
	r, perr := fhirref.Parse("Observation/" + strings.TrimPrefix(s, "Observation/"))
	if perr != nil {
		return "", "", badRequest("observation id %q: want a FHIR id, optionally as Observation/id/_history/version", s)
	}
	return r.String(), r.ID, nil
}

// Explain implements pb.DeadSpaceServer.
func (s *Server) Explain(ctx context.Context, req *pb.ExplainRequest) (*pb.ExplainResponse, error) {
	ex, err := s.explain(ctx, req)
	if err != nil {
		return nil, s.status(ctx, err)
	}
	out, err := explanation(ex)
	if err != nil {
		return nil, s.status(ctx, err)
	}
	if bg := req.GetBloodGas(); bg != nil && out.BloodGas == "" {
		out.BloodGas, _, _ = observationRef(bg.GetId())
	}
	return out, nil
}

func (s *Server) explain(ctx context.Context, req *pb.ExplainRequest) (engine.Explanation, error) {
	var rec engine.Record
	var err error
	switch t := req.GetTarget().(type) {
	case *pb.ExplainRequest_Identifier:
		rec, err = s.eng.Derivation(ctx, t.Identifier)
	case *pb.ExplainRequest_Observation:
		subj, serr := subject(t.Observation.GetSubject())
		if serr != nil {
			return engine.Explanation{}, serr
		}
		ref, id, ierr := observationRef(t.Observation.GetId())
		if ierr != nil {
			return engine.Explanation{}, ierr
		}
		rec, err = s.eng.DerivationByObservation(ctx, subj, id)
		if _, version := fhirref.Split(ref); err == nil && version != "" {
			// A version of the Observation on the server: that version of
			// the value.
			rec, err = s.eng.DerivationVersion(ctx, rec.Series, engine.Version{ServerVersion: version})
		}
	case *pb.ExplainRequest_SeriesVersion:
		sv := t.SeriesVersion
		var v engine.Version
		switch ver := sv.GetVersion().(type) {
		case *pb.SeriesVersion_Revision:
			if ver.Revision == 0 {
				return engine.Explanation{}, badRequest("revision counts from 1")
			}
			v.Revision = int(ver.Revision)
		case *pb.SeriesVersion_ServerVersion:
			if ver.ServerVersion == "" {
				return engine.Explanation{}, badRequest("server_version is empty")
			}
			v.ServerVersion = ver.ServerVersion
		default:
			return engine.Explanation{}, badRequest("series_version: name the version by revision or server_version")
		}
		rec, err = s.eng.DerivationVersion(ctx, sv.GetSeries(), v)
	case *pb.ExplainRequest_BloodGas:
		subj, serr := subject(t.BloodGas.GetSubject())
		if serr != nil {
			return engine.Explanation{}, serr
		}
		ref, _, ierr := observationRef(t.BloodGas.GetId())
		if ierr != nil {
			return engine.Explanation{}, ierr
		}
		return s.eng.ExplainBloodGas(ctx, subj, ref)
	default:
		return engine.Explanation{}, badRequest("name a target: identifier, observation, blood_gas or series_version")
	}
	if err != nil {
		return engine.Explanation{}, err
	}
	return s.eng.Explain(ctx, rec)
}

// pageToken is what a ListDerivations page token holds. Query binds it to
// the subject and range it was issued for, so it cannot page another
// patient's list by mistake.
type pageToken struct {
	Version int    `json:"v"`
	Query   string `json:"q"`
	After   string `json:"a"`
}

func queryDigest(subj string, from, to time.Time) string {
	h := sha256.Sum256([]byte(subj + "\x00" + from.UTC().Format(time.RFC3339Nano) + "\x00" + to.UTC().Format(time.RFC3339Nano)))
	return hex.EncodeToString(h[:8])
}

func encodePageToken(query, after string) string {
	b, _ := json.Marshal(pageToken{Version: 1, Query: query, After: after})
	return base64.RawURLEncoding.EncodeToString(b)
}

func decodePageToken(tok, query string) (string, error) {
	b, err := base64.RawURLEncoding.DecodeString(tok)
	var pt pageToken
	if err != nil || json.Unmarshal(b, &pt) != nil || pt.Version != 1 || pt.After == "" {
		return "", badRequest("page_token is not one this service issued")
	}
	if pt.Query != query {
		return "", badRequest("page_token was issued for another subject or time range")
	}
	return pt.After, nil
}

// The open bounds of a time range.
var (
	rangeStart = time.Date(1, 1, 1, 0, 0, 0, 0, time.UTC)
	rangeEnd   = time.Date(9999, 12, 31, 23, 59, 59, 0, time.UTC)
)

// ListDerivations implements pb.DeadSpaceServer. A page ends at the entry
// it last returned; if that entry's time changes before the next page is
// read (its blood gas re-timed by a correction), the next page starts from
// its new place.
func (s *Server) ListDerivations(ctx context.Context, req *pb.ListDerivationsRequest) (*pb.ListDerivationsResponse, error) {
	subj, err := subject(req.GetSubject())
	if err != nil {
		return nil, s.status(ctx, err)
	}
	from, to := rangeStart, rangeEnd
	if req.From != nil {
		if err := req.From.CheckValid(); err != nil {
			return nil, s.status(ctx, badRequest("from: %v", err))
		}
		from = req.From.AsTime()
	}
	if req.To != nil {
		if err := req.To.CheckValid(); err != nil {
			return nil, s.status(ctx, badRequest("to: %v", err))
		}
		to = req.To.AsTime()
	}
	if !from.Before(to) {
		return nil, s.status(ctx, badRequest("from must be before to"))
	}
	size := int(req.GetPageSize())
	switch {
	case size < 0:
		return nil, s.status(ctx, badRequest("page_size must not be negative"))
	case size == 0:
		size = defaultPageSize
	case size > maxPageSize:
		size = maxPageSize
	}
	query := queryDigest(subj, from, to)
	after := ""
	if tok := req.GetPageToken(); tok != "" {
		if after, err = decodePageToken(tok, query); err != nil {
			return nil, s.status(ctx, err)
		}
	}
	recs, err := s.eng.Derivations(ctx, subj, from, to, after, size+1)
	if err != nil {
		return nil, s.status(ctx, err)
	}
	out := &pb.ListDerivationsResponse{}
	if len(recs) > size {
		recs = recs[:size]
		out.NextPageToken = encodePageToken(query, recs[size-1].Series)
	}
	for _, rec := range recs {
		d, err := derivation(rec)
		if err != nil {
			return nil, s.status(ctx, err)
		}
		out.Derivations = append(out.Derivations, d)
	}
	return out, nil
}

// Resume tokens are the feed's sequence numbers in decimal. Clients are
// told they are opaque, so the form can change with the store.
func resumeToken(seq uint64) string { return strconv.FormatUint(seq, 10) }

// WatchDerivations implements pb.DeadSpaceServer. It reads the feed from
// the token on, in order: the store hands events out in Seq order and the
// stream sends each exactly once, so a client that resumes with the token
// of the last event it received misses nothing and sees nothing twice. New
// events are found by polling the feed every WatchPoll.
func (s *Server) WatchDerivations(req *pb.WatchDerivationsRequest, stream pb.DeadSpace_WatchDerivationsServer) error {
	ctx := stream.Context()
	if w := s.cfg.Watchers; w != nil {
		w(1)
		defer w(-1)
	}
	filter := ""
	if req.GetSubject() != "" {
		subj, err := subject(req.GetSubject())
		if err != nil {
			return s.status(ctx, err)
		}
		filter = subj
	}
	last, err := s.eng.LastEvent(ctx)
	if err != nil {
		return s.status(ctx, err)
	}
	var after uint64
	switch tok := req.GetResumeToken(); {
	case tok != "":
		if after, err = strconv.ParseUint(tok, 10, 64); err != nil {
			return s.status(ctx, badRequest("resume_token is not one this service issued"))
		}
		if after > last {
			return s.status(ctx, badRequest("resume_token is ahead of the feed: it was issued by another store"))
		}
	case req.GetFromStart():
		after = 0
	default:
		after = last
	}
	if err := stream.Send(&pb.WatchDerivationsResponse{ResumeToken: resumeToken(after)}); err != nil {
		return s.status(ctx, err)
	}
	tick := time.NewTicker(s.cfg.WatchPoll)
	defer tick.Stop()
	for {
		evs, err := s.eng.Events(ctx, after, watchBatch)
		if err != nil {
			return s.status(ctx, err)
		}
		sent := false
		for _, ev := range evs {
			after = ev.Seq
			if filter != "" && ev.Subject != filter {
				continue
			}
			msg, err := s.event(ctx, ev)
			if err != nil {
				return s.status(ctx, err)
			}
			if err := stream.Send(msg); err != nil {
				return s.status(ctx, err)
			}
			sent = true
		}
		if len(evs) > 0 && !sent {
			// Every event was another patient's: a checkpoint keeps the
			// client's token current so a reconnect does not rescan them.
			if err := stream.Send(&pb.WatchDerivationsResponse{ResumeToken: resumeToken(after)}); err != nil {
				return s.status(ctx, err)
			}
		}
		if len(evs) == watchBatch {
			continue // more are waiting
		}
		select {
		case <-ctx.Done():
			return s.status(ctx, ctx.Err())
		case <-s.stopping:
			return nil
		case <-tick.C:
		}
	}
}

// event describes one feed event with the derivation as it is now.
func (s *Server) event(ctx context.Context, ev store.Event) (*pb.WatchDerivationsResponse, error) {
	de := &pb.DerivationEvent{Series: ev.Series, Subject: ev.Subject, Key: ev.Key, Status: ev.Status, At: timestamp(ev.At)}
	rec, err := s.eng.Entry(ctx, ev.Series)
	switch {
	case errors.Is(err, store.ErrNotFound):
		// The feed outlived its entry; the event itself still tells what
		// happened.
		de.Superseded = true
	case err != nil:
		return nil, err
	default:
		if de.Derivation, err = derivation(rec); err != nil {
			return nil, err
		}
		de.Superseded = rec.Key != ev.Key || rec.Status != ev.Status
	}
	return &pb.WatchDerivationsResponse{ResumeToken: resumeToken(ev.Seq), Event: de}, nil
}
