package main

import (
	"bytes"
	"strings"
	"testing"

	"github.com/sidetrend/sidetrend/pgsync"
)

// TestPrintTune: one table of factors with the RMSE of the model in use
// and of the chosen one, the bound notes, and the model comparison in
// which the current degree and harmonics carry the tuned RMSE (one model,
// one RMSE). The numbers are made up for the layout.
func TestPrintTune(t *testing.T) {
	key := "north"
	res := []pgsync.TuneResult{
		{Tracker: "sales", Series: 2, LambdaBefore: 0.95, Lambda: 0.8126, SeasonLambda: 0.9737, MemoryBuckets: 5.33,
			RMSEBefore: 12.5, RMSEAfter: 11.25, N: 200, AtBound: []string{"lambda at 0.5, the bottom of its range"},
			Models: []pgsync.ModelScore{
				{Degree: 1, Period: 7, Harmonics: 3, Lambda: 0.8126, SeasonLambda: 0.99, RMSE: 11.0, N: 200},
				{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.8126, SeasonLambda: 0.9737, RMSE: 11.25, N: 200, Current: true},
			}, Best: 0},
		{Tracker: "sales", SeriesKey: &key, Series: 1, LambdaBefore: 0.95, Lambda: 0.9, RMSEBefore: 13, RMSEAfter: 12, N: 100},
	}
	var b bytes.Buffer
	printTune(&b, res)
	out := b.String()
	for _, want := range []string{
		"lambda now", "season now", "rmse now", "rmse tuned",
		"0.9737", "11.2500", "12.5000",
		"sales: lambda at 0.5, the bottom of its range; the best setting may lie beyond it",
		"current degree and harmonics (rmse tuned)",
		"--apply --model` switches to it",
	} {
		if !strings.Contains(out, want) {
			t.Errorf("output lacks %q:\n%s", want, out)
		}
	}
	if strings.Count(out, "11.2500") != 2 {
		t.Errorf("the tuned model's RMSE should appear in the table and in its model row, the same number:\n%s", out)
	}
}
