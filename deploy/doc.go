// Package deploy holds no code: its folder holds the deployment files of
// plumb (container image, NATS server configurations, Prometheus and Grafana
// provisioning), and its tests check them against each other, against the
// plumb command's flags and against the NATS server's own configuration
// parser and permission checks.
//
// # Files
//
//	Dockerfile                      the plumb image
//	nats.conf                       one server with JetStream, no authentication (development)
//	cluster/nats-<n>.conf           server n of the 3-server cluster: its name, then common.conf
//	cluster/common.conf             ports, max_payload, JetStream store, cluster routes
//	cluster/accounts.conf           accounts PLUMB (users producer, worker, bot) and SYS
//	example.env                     the secrets docker-compose.yml and the servers read
//	prometheus.yml                  scrapes every worker's --metrics endpoint
//	grafana/provisioning/...        Grafana's data source and dashboard provider
//	grafana/dashboards/plumb.json   the workers' dashboard
//
// ../docker-compose.yml runs them together.
package deploy
