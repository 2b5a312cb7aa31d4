/* Draws the charts one after the other so the page stays responsive on long reports. */
(function(){
var nodes=Array.prototype.slice.call(document.querySelectorAll('div.chart[data-spec]'));
var body=document.body,done=0,failed=0;
function mark(){body.setAttribute('data-charts-rendered',String(done));
body.setAttribute('data-charts-failed',String(failed));}
function draw(i){
 if(i>=nodes.length){mark();body.setAttribute('data-charts-complete','yes');return;}
 var node=nodes[i],spec;
 try{spec=JSON.parse(document.getElementById(node.getAttribute('data-spec')).textContent);}
 catch(err){failed++;node.textContent='Chart specification unreadable: '+err;console.error(err);draw(i+1);return;}
 vegaEmbed(node,spec,{renderer:'svg',actions:false}).then(function(){done++;},function(err){
  failed++;node.textContent='Chart could not be drawn: '+err;console.error(err);
 }).then(function(){mark();setTimeout(function(){draw(i+1);},0);});
}
draw(0);
})();
