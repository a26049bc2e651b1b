package deploy

import (
	appsv1 "k8s.io/api/apps/v1"
	metav1 "k8s.io/apimachinery/pkg/apis/meta/v1"
	"k8s.io/apimachinery/pkg/labels"
)

func metav1LabelSelector(d appsv1.Deployment) (labels.Selector, error) {
	return metav1.LabelSelectorAsSelector(d.Spec.Selector)
}
