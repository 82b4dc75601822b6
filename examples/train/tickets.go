package main

import (
	"bytes"
	"fmt"
	"math/rand/v2"
	"strings"

	"codeberg.org/sbinet/npyio/npy"
)

// The tickets scenario is invented: short maintenance notes that pump
// technicians type after a visit, classed urgent, routine or
// informational. The words, the notes and the rule that labels them are
// made up for the demo.

// ticketClasses are the model's outputs, in output order.
var ticketClasses = []string{"urgent", "routine", "informational"}

// Sizes of the tickets data set.
const (
	ticketLen       = 16 // tokens per note, padded with [pad]
	ticketTrain     = 2400
	ticketTest      = 600
	ticketReference = 40
	ticketEmbed     = 12 // embedding width
	ticketChannels  = 24 // convolution channels
)

// The special tokens: id 0 pads a note to ticketLen, id 1 stands for a
// word the vocabulary lacks.
const (
	padToken = "[pad]"
	unkToken = "[unk]"
)

// ticketDeciding are the words that decide a note's class, per class in
// ticketClasses order.
var ticketDeciding = [][]string{
	{"leaking", "smoking", "seized", "sparking", "flooding", "overheating", "cracked", "burst", "tripped", "screeching"},
	{"greased", "lubricated", "tightened", "replaced", "scheduled", "calibrated", "flushed", "cleaned", "adjusted", "serviced"},
	{"noted", "logged", "fyi", "observed", "recorded", "photographed", "reported", "mentioned", "documented", "forwarded"},
}

// ticketFiller are the words that carry no class: parts, places, people,
// times and the glue of a note.
var ticketFiller = strings.Fields(`
	pump motor seal bearing impeller casing shaft coupling valve gasket
	flange pipe inlet outlet suction discharge filter strainer gauge sensor
	panel cable fuse breaker relay switch belt pulley mount bolt
	nut washer housing cover guard base skid frame manifold hose
	line header tank sump pit basin well station room hall
	north south east west upper lower left right front rear
	unit one two three four five six seven eight nine
	ten twenty morning afternoon evening night shift today yesterday week
	monday tuesday wednesday thursday friday saturday sunday visit site crew
	the a an on at in near by with from
	to of and for after before during under over behind
	checked found saw heard arrived departed called asked spoke met
	operator supervisor technician contractor engineer team owner manager tenant fitter
	small large old new main spare backup standby second third
	slight minor usual normal steady quiet warm dry wet dusty
	again still also only just nearly about around every each
	hours minutes days metres litres bar volts amps rpm degrees
	reading level pressure flow temperature noise smell sound colour speed
	pumpset drive gearbox controller inverter starter meter alarm light label
	ladder door gate stairs roof floor wall corner bay yard
	tag card sheet form report book ticket job order log
	blue red green grey yellow black white orange brown silver
	as per no change since last time see above below`)

// ticketVocabulary returns the vocabulary: the special tokens, then the
// deciding words class by class, then the filler words; a token's id is
// its index.
func ticketVocabulary() []string {
	v := []string{padToken, unkToken}
	for _, words := range ticketDeciding {
		v = append(v, words...)
	}
	return append(v, ticketFiller...)
}

// ticketNote is one invented note with its ground truth.
type ticketNote struct {
	Words   []string // the note's words, at most ticketLen
	Label   int      // index into ticketClasses
	Planted int      // the position of the deciding word of the note's class
}

// drawTicket draws one note of class label: 5 to 13 filler words, the
// class's deciding word at a random position and, for an urgent note with
// probability 0.3, a routine word as well (the rule: a note with an urgent
// word is urgent, whatever else it says; else one with a routine word is
// routine; else informational, which always has an informational word).
func drawTicket(rng *rand.Rand, label int) ticketNote {
	n := 5 + rng.IntN(9)
	words := make([]string, n)
	for i := range words {
		words[i] = ticketFiller[rng.IntN(len(ticketFiller))]
	}
	insert := func(w string) int {
		at := rng.IntN(len(words) + 1)
		words = append(words[:at], append([]string{w}, words[at:]...)...)
		return at
	}
	deciding := ticketDeciding[label]
	planted := insert(deciding[rng.IntN(len(deciding))])
	if label == 0 && rng.Float64() < 0.3 {
		routine := ticketDeciding[1]
		if at := insert(routine[rng.IntN(len(routine))]); at <= planted {
			planted++
		}
	}
	return ticketNote{Words: words, Label: label, Planted: planted}
}

// ticketSet is the whole invented data set.
type ticketSet struct {
	Train, Test, Reference []ticketNote
}

// generateTickets draws the data set from seed: classes in equal shares,
// drawn in turn at random; the reference set is routine notes.
func generateTickets(seed uint64) ticketSet {
	rng := rand.New(rand.NewPCG(seed, 0x7469636b)) // stream "tick"
	draw := func(n int) []ticketNote {
		out := make([]ticketNote, n)
		for i := range out {
			out[i] = drawTicket(rng, rng.IntN(len(ticketClasses)))
		}
		return out
	}
	s := ticketSet{Train: draw(ticketTrain), Test: draw(ticketTest)}
	for len(s.Reference) < ticketReference {
		s.Reference = append(s.Reference, drawTicket(rng, 1))
	}
	return s
}

// ticketIDs returns the token ids of a note, padded to ticketLen.
func ticketIDs(vocab map[string]int, t ticketNote) []int {
	ids := make([]int, ticketLen)
	for i, w := range t.Words {
		id, ok := vocab[w]
		if !ok {
			id = 1
		}
		ids[i] = id
	}
	return ids
}

// ticketText writes one note per line.
func ticketText(notes []ticketNote) []byte {
	var b bytes.Buffer
	for _, t := range notes {
		b.WriteString(strings.Join(t.Words, " "))
		b.WriteByte('\n')
	}
	return b.Bytes()
}

// ticketTruthNPY is int64 [n, 2]: each note's class and the position of
// its planted deciding word.
func ticketTruthNPY(notes []ticketNote) ([]byte, error) {
	v := make([][2]int64, len(notes))
	for i, t := range notes {
		v[i] = [2]int64{int64(t.Label), int64(t.Planted)}
	}
	var b bytes.Buffer
	if err := npy.Write(&b, v); err != nil {
		return nil, fmt.Errorf("ticket labels: %w", err)
	}
	return b.Bytes(), nil
}

// ticketSample returns the first held-out urgent note that also holds a
// routine word: the one whose explanation has something to weigh.
func ticketSample(test []ticketNote) ticketNote {
	routine := map[string]bool{}
	for _, w := range ticketDeciding[1] {
		routine[w] = true
	}
	for _, t := range test {
		if t.Label != 0 {
			continue
		}
		for _, w := range t.Words {
			if routine[w] {
				return t
			}
		}
	}
	return test[0]
}
