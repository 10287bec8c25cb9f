package fitjob

// Data is every learner's answer sequence for one skill, flattened so that
// EM walks one contiguous slice.
type Data struct {
	// Obs holds all answers, learner after learner, each learner's in order;
	// true = correct.
	Obs []bool
	// Ends[i] is where learner i's sequence ends (exclusive) in Obs;
	// learner i's answers are Obs[Ends[i-1]:Ends[i]] (Ends[-1] = 0).
	Ends []int
}

// Add appends one learner's sequence. Empty sequences are ignored.
func (d *Data) Add(seq []bool) {
	if len(seq) == 0 {
		return
	}
	d.Obs = append(d.Obs, seq...)
	d.Ends = append(d.Ends, len(d.Obs))
}

// Learners is the number of sequences.
func (d *Data) Learners() int { return len(d.Ends) }

// Answers is the number of answers in all sequences.
func (d *Data) Answers() int { return len(d.Obs) }

// Seq returns learner i's sequence (a view into Obs).
func (d *Data) Seq(i int) []bool {
	start := 0
	if i > 0 {
		start = d.Ends[i-1]
	}
	return d.Obs[start:d.Ends[i]]
}

// Subset returns the learners at the given indexes, in that order.
func (d *Data) Subset(idx []int) *Data {
	out := &Data{}
	for _, i := range idx {
		out.Add(d.Seq(i))
	}
	return out
}
