package boltstore

import (
	"bytes"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// The time key must sort as the instants do, across the zero time, the
// Unix epoch and sub-second steps, because Prune and EntriesBetween scan
// it as a range.
func TestTimeKeyOrder(t *testing.T) {
	times := []time.Time{
		{},
		time.Date(1969, 12, 31, 23, 59, 59, 999999999, time.UTC),
		time.Unix(0, 0),
		time.Unix(0, 1),
		time.Date(2024, 3, 14, 2, 0, 0, 0, time.FixedZone("", 3600)), // 01:00Z
		time.Date(2024, 3, 14, 1, 30, 0, 0, time.UTC),
		time.Date(2262, 4, 12, 0, 0, 0, 0, time.UTC), // past UnixNano's range
	}
	for i := 1; i < len(times); i++ {
		a, b := appendTimeKey(nil, times[i-1]), appendTimeKey(nil, times[i])
		if bytes.Compare(a, b) >= 0 {
			t.Errorf("key(%v) >= key(%v)", times[i-1], times[i])
		}
		if got := parseTimeKey(b); !got.Equal(times[i]) {
			t.Errorf("parseTimeKey = %v, want %v", got, times[i])
		}
	}
}

func TestRecordRoundTrip(t *testing.T) {
	zone := time.FixedZone("", -4*3600-30*60)
	at := time.Date(2024, 3, 14, 2, 3, 4, 5, zone)
	for _, tc := range []struct {
		name string
		fn   func(t *testing.T)
	}{
		{"Input", func(t *testing.T) {
			in := store.Input{Subject: "Patient/a", Logical: "Observation/b", VersionID: "7", LastUpdated: at, EffectiveAt: time.Time{}, Payload: []byte{0, 0xff}}
			got, err := decodeInput(in.Subject, in.Logical, encodeInput(in))
			if err != nil || got.VersionID != "7" || !got.LastUpdated.Equal(at) || !got.EffectiveAt.IsZero() || !bytes.Equal(got.Payload, in.Payload) {
				t.Errorf("got %+v, %v", got, err)
			}
			if _, off := got.LastUpdated.Zone(); off != -4*3600-30*60 {
				t.Errorf("offset %d", off)
			}
		}},
		{"Entry", func(t *testing.T) {
			en := store.Entry{Series: "s", Subject: "Patient/a", Key: "k", Status: "amended", ServerID: "id", ServerVersion: "2",
				Revisions: []string{"k0", ""}, EffectiveAt: at, UpdatedAt: at.UTC(), Payload: []byte("p")}
			got, err := decodeEntry("s", encodeEntry(en))
			if err != nil || got.Key != "k" || got.ServerVersion != "2" || !slices.Equal(got.Revisions, en.Revisions) || !got.UpdatedAt.Equal(at) || string(got.Payload) != "p" {
				t.Errorf("got %+v, %v", got, err)
			}
		}},
		{"Dirty", func(t *testing.T) {
			dt := store.Dirty{Subject: "Patient/a", Since: at, Generation: 7, From: at.Add(-time.Hour), Until: at.Add(time.Hour), Urgent: true}
			got, err := decodeDirty("Patient/a", encodeDirty(dt))
			if err != nil || got.Generation != 7 || !got.From.Equal(dt.From) || !got.Until.Equal(dt.Until) || !got.Urgent || !got.Since.Equal(at) {
				t.Errorf("got %+v, %v", got, err)
			}
			// A mark of schema 5 or earlier has no end: it reads as one
			// without a bound, never as one ending at the zero time's key.
			var e encoder
			e.time(at)
			e.uvarint(7)
			e.time(dt.From)
			e.uvarint(1)
			old, err := decodeDirty("Patient/a", e.b)
			if err != nil || !old.Until.IsZero() || !old.From.Equal(dt.From) || !old.Urgent {
				t.Errorf("schema 5 mark read as %+v, %v", old, err)
			}
		}},
		{"DeadLetter", func(t *testing.T) {
			dl := store.DeadLetter{Write: store.Write{ID: 9, Series: []string{"a", "b"}, Subject: "Patient/a", Body: []byte("b"), Attempts: 3, NotBefore: at, CreatedAt: at, LastError: "e"},
				Reason: "r", At: at}
			got, err := decodeDead(encodeDead(dl))
			if err != nil || got.ID != 9 || got.Attempts != 3 || !slices.Equal(got.Series, dl.Series) || got.Reason != "r" || string(got.Body) != "b" {
				t.Errorf("got %+v, %v", got, err)
			}
		}},
	} {
		t.Run(tc.name, tc.fn)
	}
}

// FuzzDecode feeds damaged records to every decoder: a damaged file must
// give ErrCorrupt, never a panic or a huge allocation.
func FuzzDecode(f *testing.F) {
	at := time.Date(2024, 3, 14, 2, 0, 0, 0, time.FixedZone("", 3600))
	f.Add(encodeInput(store.Input{VersionID: "1", LastUpdated: at, EffectiveAt: at, Payload: []byte("x")}))
	f.Add(encodeEntry(store.Entry{Key: "k", Revisions: []string{"a", "b"}, EffectiveAt: at}))
	f.Add(encodeDead(store.DeadLetter{Write: store.Write{Series: []string{"s"}, NotBefore: at}, Reason: "r"}))
	f.Add(encodeEvent(store.Event{Series: "s", At: at}))
	f.Add(encodeDirty(store.Dirty{Since: at, Generation: 3, From: at, Until: at.Add(time.Hour)}))
	f.Add([]byte{0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01})
	f.Add(places{owned: true, list: []place{{"Patient/a", appendTimeKey(nil, at)}, {"Patient/b", appendTimeKey(nil, at)}}}.encode())
	f.Fuzz(func(t *testing.T, b []byte) {
		// A place record that decodes reads back the same once encoded,
		// and its owner is one of its places.
		if p, err := decodePlaces(b); err == nil {
			if again, err := decodePlaces(p.encode()); err != nil || !reflect.DeepEqual(again, p) {
				t.Errorf("places %x read %+v, and encoded read back %+v, %v", b, p, again, err)
			}
			if o := p.owner(); o != "" && p.timeOf(o) == nil {
				t.Errorf("places %x: owner %q holds no place", b, o)
			}
		}
		_, _ = decodeInput("s", "l", b)
		_, _, _, _ = decodeInputHead(b)
		// The scan's split checks what splitInput checks and returns the
		// same version and payload.
		version, _, _, payload, err := splitInput(b)
		v2, p2, err2 := splitInputPayload(b)
		if (err == nil) != (err2 == nil) || err == nil && (!bytes.Equal(version, v2) || !bytes.Equal(payload, p2)) {
			t.Errorf("splitInputPayload = %q, %q, %v; splitInput %q, %q, %v", v2, p2, err2, version, payload, err)
		}
		_, _ = decodePatient("s", b)
		_, _ = decodeDirty("s", b)
		_, _ = decodeEntry("s", b)
		_, _ = decodeWrite(1, b)
		_, _ = decodeWriteNotBefore(b)
		_, _ = decodeDead(b)
		_, _ = decodeEvent(1, b)
	})
}

// FuzzInputRoundTrip: whatever an input holds reads back equal.
func FuzzInputRoundTrip(f *testing.F) {
	f.Add("1", int64(1710381600), uint32(0), int32(0), int64(0), []byte("payload"))
	f.Add("", int64(-62135596800), uint32(999999999), int32(-36000), int64(1), []byte{})
	f.Fuzz(func(t *testing.T, version string, sec int64, nsec uint32, off int32, effSec int64, payload []byte) {
		// Keep to what time.Time represents and real zones use.
		sec %= 1 << 40
		off %= 86400
		lu := time.Unix(sec, int64(nsec%1e9)).In(time.FixedZone("", int(off)))
		in := store.Input{Subject: "Patient/a", Logical: "Observation/b", VersionID: version, LastUpdated: lu, EffectiveAt: time.Unix(effSec%(1<<40), 0), Payload: payload}
		got, err := decodeInput(in.Subject, in.Logical, encodeInput(in))
		if err != nil {
			t.Fatal(err)
		}
		if got.VersionID != version || !got.LastUpdated.Equal(lu) || !got.EffectiveAt.Equal(in.EffectiveAt) || !bytes.Equal(got.Payload, payload) {
			t.Errorf("got %+v, want %+v", got, in)
		}
		// The zero instant reads back as time.Time{}: it means "unset",
		// and its zone means nothing.
		if _, o := got.LastUpdated.Zone(); o != int(off) && !lu.IsZero() {
			t.Errorf("offset %d, want %d", o, off)
		}
	})
}
